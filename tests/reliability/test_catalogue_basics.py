"""First cases of the reliability catalogue: recipes that are wrong in plain ways."""


def test_yaml_syntax_error(scenario):
    scenario.write_recipe(text="version: 1\nstudy: [unclosed\n")
    scenario.expect(["check", scenario.recipe], code=1, message="case.yaml")


def test_unknown_key_gets_a_did_you_mean(scenario):
    scenario.data["covariates"][0]["statz"] = ["mean"]
    scenario.write_recipe()
    scenario.expect(["check", scenario.recipe], code=1, message="statz")


def test_missing_table(scenario):
    scenario.data["study"]["table"] = "no_such_table.csv"
    scenario.write_recipe()
    scenario.expect(["run", scenario.recipe], code=1, message="no_such_table.csv")


def test_output_table_equal_to_the_study_table(scenario):
    scenario.data["output"]["table"] = "villages.csv"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message="output.table is the same file as study.table; covextract never writes over an "
        "input: choose another path",
    )
