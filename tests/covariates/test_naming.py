"""The naming rule: legal, at most 32 characters, told apart automatically or a clear error."""

import pytest

from covextract.core.progress import Progress
from covextract.demo import lay_out_demo
from covextract.run import check_recipe, run


@pytest.fixture
def demo(tmp_path):
    return lay_out_demo(tmp_path / "demo")


def _recipe(folder, covariates):
    return {
        "version": 1,
        "study": {
            "table": "villages.csv",
            "id": "village_id",
            "points": {"x": "lon", "y": "lat"},
            "date": "visit_date",
        },
        "units": {"buffer_m": 2000},
        "layers": {
            "ndvi": {"file": "ndvi_2021.tif", "scale": 0.0001, "nodata": -3000},
            "rain": {"file": "rain/rain_{year}{month:02d}.tif", "every": "month", "unit": "mm"},
        },
        "covariates": covariates,
        "output": {"table": "out/t.csv", "keep_coordinates": True},
    }


def _check(folder, covariates):
    from covextract.recipe import load_recipe

    return [str(p) for p in check_recipe(load_recipe(_recipe(folder, covariates), base_dir=folder))]


def _run(folder, covariates):
    from covextract.recipe import load_recipe

    return run(load_recipe(_recipe(folder, covariates), base_dir=folder), write=False)


def test_a_name_too_long_says_how_long_it_may_be(demo):
    problems = _check(
        demo, [{"layer": "ndvi", "name": "vegetation_index_dry_season", "stats": ["valid_share"]}]
    )
    # vegetation_index_dry_season_valid_share is 39 characters; _valid_share takes 12 of 32
    assert len(problems) == 1
    assert "is 39 characters long; statistics packages accept at most 32" in problems[0]
    assert "shorten its name: to at most 20 characters" in problems[0]


def test_an_unnamed_column_too_long_asks_for_a_name(demo):
    problems = _check(
        demo,
        [
            {
                "layer": "rain",
                "stats": ["q97.5"],
                "anomaly": {"baseline": "2019..2021", "kind": "zscore", "min_years": 2},
                "before": {
                    "months": 12,
                    "lag_months": 11,
                    "combine": "count_above",
                    "threshold": 1,
                },
            }
        ],
    )
    assert len(problems) == 1
    assert "column 'rain_q97p5_z_count_above12m_lag11' is 33 characters long" in problems[0]
    assert "give it a short name:" in problems[0]


def test_two_entries_on_one_layer_get_their_own_qa_columns(demo):
    result = _run(
        demo,
        [{"layer": "ndvi", "stats": ["mean"]}, {"layer": "ndvi", "stats": ["max"]}],
    )
    assert result.columns == ["ndvi_mean", "ndvi_mean_qa", "ndvi_max", "ndvi_max_qa"]


def test_two_entries_writing_one_column_name_both_counted_from_one(demo):
    problems = _check(
        demo,
        [{"layer": "ndvi", "stats": ["mean"]}, {"layer": "ndvi", "stats": ["mean", "max"]}],
    )
    assert len(problems) == 1
    assert (
        "the 2nd covariate (layer 'ndvi') would write column 'ndvi_mean', which the 1st "
        "covariate already writes. Add a distinct name: to the 2nd covariate"
    ) in problems[0]


def test_a_name_wins_and_drops_the_window_suffix(demo):
    result = _run(
        demo,
        [
            {"layer": "rain", "stats": ["mean"], "before": {"months": 3, "lag_months": 1}},
            {
                "layer": "rain",
                "name": "wet",
                "stats": ["mean"],
                "before": {"months": 6, "lag_months": 1, "combine": "count_above", "threshold": 90},
            },
        ],
    )
    assert result.columns == ["rain_mean_sum3m_lag1", "rain_sum3m_lag1_qa", "wet_mean", "wet_qa"]


class _Recorder(Progress):
    def __init__(self):
        self.events = []

    def note(self, text):
        self.events.append(("note", text))

    def start(self, label, total):
        self.events.append(("start", label))

    def finish(self):
        self.events.append(("finish",))


def test_the_run_notes_a_first_compile_and_reports_each_pass(demo, monkeypatch):
    import covextract.engine.compile_state as compile_state
    from covextract.recipe import load_recipe

    monkeypatch.setattr(compile_state, "kernels_need_compiling", lambda rules=None: True)
    progress = _Recorder()
    recipe = load_recipe(_recipe(demo, [{"layer": "ndvi", "stats": ["mean"]}]), base_dir=demo)
    run(recipe, write=False, progress=progress)
    assert progress.events[0][0] == "note" and "compiling" in progress.events[0][1]
    assert progress.events[1:] == [("start", "ndvi (layer ndvi)"), ("finish",)]
