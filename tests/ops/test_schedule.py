"""Schedules for ``covextract refresh``: crontab lines, systemd units, the install path.

Cron facts checked here are from crontab(5) (common practice): five time
fields ``minute hour day-of-month month weekday`` with weekday 0 = Sunday, and
an unescaped ``%`` in the command becomes a newline. systemd facts are from
systemd.timer(5) and systemd.time(7): ``OnCalendar=DOW *-*-DD HH:MM:SS`` and
``Persistent=true``.
"""

from __future__ import annotations

import os
import shlex
import stat
import subprocess

import pytest
import typer
from typer.testing import CliRunner

from covextract.cli.schedule import schedule_command
from covextract.errors import RecipeError
from covextract.ops import schedule as sched


@pytest.fixture
def recipe(tmp_path):
    folder = tmp_path / "lake 50% site"
    folder.mkdir()
    path = folder / "recipe.yaml"
    path.write_text("version: 1\n")
    return path


def _cron_unescape(command: str) -> str:
    # What cron does to the command before handing it to /bin/sh.
    return command.replace("\\%", "%")


def test_crontab_line_fields_and_absolute_paths(recipe, monkeypatch):
    monkeypatch.chdir(recipe.parent)
    line = sched.crontab_line(
        python="/opt/env/bin/python",
        recipe="recipe.yaml",
        log="logs/r.log",
        day=7,
        hour=4,
        minute=30,
        tag="abc",
    )
    fields = line.split(" ", 5)
    assert fields[:5] == ["30", "4", "7", "*", "*"]
    assert line.endswith(" # covextract:abc")
    command = _cron_unescape(fields[5].removesuffix(" # covextract:abc"))
    words = shlex.split(command)
    assert words == [
        "/opt/env/bin/python",
        "-m",
        "covextract",
        sched.VERB,
        str(recipe.resolve()),
        ">>",
        str((recipe.parent / "logs" / "r.log").resolve()),
        "2>&1",
    ]


def test_percent_is_escaped_for_cron(recipe):
    line = sched.crontab_line(python="/usr/bin/python3", recipe=recipe, log=recipe.parent / "x.log")
    assert "%" in str(recipe)
    assert "50\\%" in line
    # Every % in the line is escaped: removing the escaped ones leaves none.
    assert "%" not in line.replace("\\%", "")


def test_cron_command_runs_in_sh_with_the_awkward_path(recipe, tmp_path):
    # A stand-in interpreter in the folder with a space and a '%' that
    # records its arguments; the command cron would run must reach it intact.
    fake_python = recipe.parent / "py thon"
    fake_python.write_text('#!/bin/sh\nfor a in "$@"; do echo "$a"; done\n')
    fake_python.chmod(fake_python.stat().st_mode | stat.S_IEXEC)
    log = recipe.parent / "out.log"
    line = sched.crontab_line(python=str(fake_python), recipe=recipe, log=log, tag="t")
    command = _cron_unescape(line.split(" ", 5)[5])
    subprocess.run(["/bin/sh", "-c", command], check=True, timeout=10)
    assert log.read_text().splitlines() == ["-m", "covextract", sched.VERB, str(recipe.resolve())]


def test_python_symlink_is_kept(tmp_path, recipe):
    # A venv's python is a symlink; resolving it would lose the venv.
    link = tmp_path / "venv-python"
    link.symlink_to("/bin/sh")
    line = sched.crontab_line(python=str(link), recipe=recipe, log=tmp_path / "l.log")
    assert shlex.split(line.split(" ", 5)[5])[0] == str(link)


@pytest.mark.parametrize("day", [29, 30, 31])
def test_days_29_to_31_are_refused_for_monthly_runs(recipe, day):
    with pytest.raises(RecipeError, match="choose day 28 or earlier") as info:
        sched.crontab_line(python="/p", recipe=recipe, log="/l", day=day)
    assert info.value.problems[0].key == "day"
    with pytest.raises(RecipeError, match="choose day 28 or earlier"):
        sched.systemd_units(python="/p", recipe=recipe, log="/l", day=day)


@pytest.mark.parametrize(
    ("kwargs", "key"),
    [
        ({"day": 0}, "day"),
        ({"every": "week", "day": 7}, "day"),
        ({"hour": 24}, "hour"),
        ({"minute": 60}, "minute"),
        ({"every": "year"}, "every"),
        ({"tag": "a b"}, "tag"),
    ],
)
def test_bad_settings_are_refused_naming_the_setting(recipe, kwargs, key):
    with pytest.raises(RecipeError) as info:
        sched.crontab_line(python="/p", recipe=recipe, log="/l", **kwargs)
    assert info.value.problems[0].key == key


def test_weekly_and_daily_lines(recipe):
    weekly = sched.crontab_line(
        python="/p", recipe=recipe, log="/l", every="week", day=1, hour=5, minute=15
    )
    assert weekly.split(" ")[:5] == ["15", "5", "*", "*", "1"]
    daily = sched.crontab_line(python="/p", recipe=recipe, log="/l", every="day", day=17)
    assert daily.split(" ")[:5] == ["0", "3", "*", "*", "*"]


def test_default_tag_is_stable_per_recipe(recipe, tmp_path):
    other = tmp_path / "other.yaml"
    assert sched.default_tag(recipe) == sched.default_tag(str(recipe))
    assert sched.default_tag(recipe) != sched.default_tag(other)
    line = sched.crontab_line(python="/p", recipe=recipe, log="/l")
    assert line.endswith(f"# covextract:{sched.default_tag(recipe)}")


def test_default_log_of_a_file_that_is_no_recipe_is_next_to_it(recipe):
    assert (
        sched.default_log(recipe) == recipe.resolve().parent / ".covextract-state" / "refresh.log"
    )


def test_default_log_is_in_the_recipes_state_folder(demo_dir, write_recipe, demo_recipe_data):
    data = {**demo_recipe_data, "output": {**demo_recipe_data["output"], "state": "keep/st"}}
    recipe = write_recipe(demo_dir, data)
    assert sched.default_log(recipe) == (demo_dir / "keep" / "st" / "refresh.log").resolve()
    # the demo's own recipe: the default state folder, next to the study table
    assert (
        sched.default_log(demo_dir / "recipe.yaml")
        == (demo_dir / ".covextract-state" / "refresh.log").resolve()
    )


def test_the_scheduled_command_is_the_incremental_refresh():
    assert sched.VERB == "refresh"


@pytest.mark.parametrize(
    ("kwargs", "calendar"),
    [
        ({"day": 5, "hour": 4, "minute": 7}, "OnCalendar=*-*-05 04:07:00"),
        ({"every": "week", "day": 1}, "OnCalendar=Mon *-*-* 03:00:00"),
        ({"every": "week", "day": 0}, "OnCalendar=Sun *-*-* 03:00:00"),
        ({"every": "day", "hour": 22}, "OnCalendar=*-*-* 22:00:00"),
    ],
)
def test_systemd_units(recipe, kwargs, calendar):
    units = sched.systemd_units(
        python="/opt/env/bin/python",
        recipe=recipe,
        log=recipe.parent / "r.log",
        name="lake",
        **kwargs,
    )
    assert sorted(units) == ["covextract-lake.service", "covextract-lake.timer"]
    timer = units["covextract-lake.timer"].splitlines()
    assert calendar in timer
    assert "Persistent=true" in timer
    assert "Unit=covextract-lake.service" in timer
    every = kwargs.get("every", "month")
    assert timer[1].endswith({"month": "(monthly)", "week": "(weekly)", "day": "(daily)"}[every])
    service = units["covextract-lake.service"].splitlines()
    assert "Type=oneshot" in service
    # '%' is a specifier in unit files and is doubled.
    assert f"WorkingDirectory={recipe.resolve().parent}".replace("%", "%%") in service
    exec_line = next(s for s in service if s.startswith("ExecStart="))
    # systemd's double quotes with C escapes read like POSIX shell double quotes here.
    words = shlex.split(exec_line.removeprefix("ExecStart=").replace("%%", "%"))
    assert words[:2] == ["/bin/sh", "-c"]
    assert words[2] == sched.refresh_command(
        python="/opt/env/bin/python", recipe=recipe, log=recipe.parent / "r.log"
    )


# ----------------------------------------------------------------- install path
@pytest.fixture
def fake_crontab(tmp_path, monkeypatch):
    """A ``crontab`` on PATH keeping the table in a file; returns that file."""
    bindir = tmp_path / "bin"
    bindir.mkdir()
    table = tmp_path / "crontab.txt"
    script = bindir / "crontab"
    script.write_text(
        "#!/bin/sh\n"
        f"TABLE={shlex.quote(str(table))}\n"
        'if [ "$1" = "-l" ]; then\n'
        '  if [ -f "$TABLE" ]; then cat "$TABLE"; exit 0; fi\n'
        '  echo "no crontab for tester" >&2; exit 1\n'
        "fi\n"
        'if [ "$1" = "-" ]; then cat > "$TABLE"; exit 0; fi\n'
        "exit 64\n"
    )
    script.chmod(0o755)
    monkeypatch.setenv("PATH", f"{bindir}{os.pathsep}{os.environ['PATH']}")
    return table


def test_install_into_an_empty_crontab(fake_crontab, recipe):
    line = sched.crontab_line(python="/p", recipe=recipe, log="/l", tag="new")
    text = sched.install_crontab(line, "new")
    assert text == line + "\n"
    assert fake_crontab.read_text() == line + "\n"


def test_install_replaces_only_its_own_line(fake_crontab, recipe):
    old = sched.crontab_line(python="/p", recipe=recipe, log="/l", day=2, tag="lake")
    other = sched.crontab_line(python="/p", recipe=recipe, log="/l", day=3, tag="lakeside")
    fake_crontab.write_text(
        "MAILTO=someone@example.invalid\n"
        "# nightly backup\n"
        "15 1 * * * /usr/local/bin/backup\n"
        f"{old}\n"
        f"{other}\n"
    )
    new = sched.crontab_line(python="/p", recipe=recipe, log="/l", day=9, tag="lake")
    sched.install_crontab(new, "lake")
    assert fake_crontab.read_text().splitlines() == [
        "MAILTO=someone@example.invalid",
        "# nightly backup",
        "15 1 * * * /usr/local/bin/backup",
        new,
        other,
    ]
    # Installing the same line again changes nothing.
    before = fake_crontab.read_text()
    sched.install_crontab(new, "lake")
    assert fake_crontab.read_text() == before


def test_install_refuses_a_line_without_its_tag(fake_crontab, recipe):
    line = sched.crontab_line(python="/p", recipe=recipe, log="/l", tag="one")
    with pytest.raises(RecipeError):
        sched.install_crontab(line, "two")
    assert not fake_crontab.exists()


def _app() -> typer.Typer:
    app = typer.Typer()
    app.command("schedule")(schedule_command)

    @app.callback()
    def _group() -> None:
        """Keep 'schedule' a named subcommand."""

    return app


def test_cli_prints_the_line_and_installs_nothing(fake_crontab, recipe):
    result = CliRunner().invoke(_app(), ["schedule", str(recipe), "--day", "12"])
    assert result.exit_code == 0, result.output
    first = result.stdout.splitlines()[0]
    assert first.startswith("0 3 12 * * ")
    assert f"covextract {sched.VERB} " in first
    assert not fake_crontab.exists()


def test_cli_install_declined_installs_nothing(fake_crontab, recipe):
    result = CliRunner().invoke(_app(), ["schedule", str(recipe), "--install"], input="n\n")
    assert result.exit_code == 1
    assert "Nothing installed" in result.stderr
    assert not fake_crontab.exists()
    assert not sched.default_log(recipe).parent.exists()


def test_cli_install_confirmed(fake_crontab, recipe):
    fake_crontab.write_text("15 1 * * * /usr/local/bin/backup\n")
    result = CliRunner().invoke(_app(), ["schedule", str(recipe), "--install"], input="y\n")
    assert result.exit_code == 0, result.output
    line = result.stdout.splitlines()[0]
    assert fake_crontab.read_text().splitlines() == ["15 1 * * * /usr/local/bin/backup", line]
    assert sched.default_log(recipe).parent.is_dir()


def test_cli_install_yes_skips_the_question(fake_crontab, recipe):
    result = CliRunner().invoke(_app(), ["schedule", str(recipe), "--install", "--yes"])
    assert result.exit_code == 0, result.output
    assert fake_crontab.read_text() == result.stdout.splitlines()[0] + "\n"


def test_cli_day_31_is_a_clean_error(fake_crontab, recipe):
    result = CliRunner().invoke(
        _app(), ["schedule", str(recipe), "--day", "31", "--install", "--yes"]
    )
    assert result.exit_code == 1
    assert result.stderr.startswith("error: day: 31 is not a day of every month")
    assert "choose day 28 or earlier" in result.stderr
    assert not fake_crontab.exists()


def test_cli_systemd_prints_units_and_refuses_install(fake_crontab, recipe):
    shown = CliRunner().invoke(_app(), ["schedule", str(recipe), "--systemd", "--every", "week"])
    assert shown.exit_code == 0, shown.output
    name = f"covextract-{sched.default_tag(recipe)}"
    assert f"# ~/.config/systemd/user/{name}.service" in shown.stdout
    assert "Persistent=true" in shown.stdout
    assert f"systemctl --user enable --now {name}.timer" in shown.stdout
    refused = CliRunner().invoke(
        _app(), ["schedule", str(recipe), "--systemd", "--install", "--yes"]
    )
    assert refused.exit_code == 1
    assert "--install adds crontab lines only" in refused.stderr
    assert "Persistent=true" in refused.stdout
    assert not fake_crontab.exists()


def test_cli_missing_recipe(tmp_path):
    result = CliRunner().invoke(_app(), ["schedule", str(tmp_path / "none.yaml")])
    assert result.exit_code == 1
    assert "not found" in result.stderr
