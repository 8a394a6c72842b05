"""Plan and run a recipe: the layer ``run``, ``refresh``, ``status`` and ``check`` share."""

from covextract.run.execute import RunResult, run
from covextract.run.plan import Plan, check_recipe, plan_recipe

__all__ = ["Plan", "RunResult", "check_recipe", "plan_recipe", "run"]
