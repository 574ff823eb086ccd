"""The run file: parsing, errors with lines, overrides, canonical form, starter file."""

from __future__ import annotations

import csv
import dataclasses
import tomllib
from pathlib import Path

import pandas as pd
import pytest
from conftest import examples
from hypothesis import given, settings
from hypothesis import strategies as st

from panelprep import config
from panelprep.checks import CHECK_IDS, Thresholds
from panelprep.config import RunFile, key_lines, load_run_file
from panelprep.draft import starter_run_file
from panelprep.errors import InputError
from panelprep.io import ReadOptions

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

MINIMAL = """\
[input]
path = "data.csv"

[panel]
entity = "firm_id"
time = "year"

[model]
y = "sales"
x = ["capital", "staff"]

[output]
dir = "out"
"""


def write(folder: Path, text: str, name: str = "run.toml") -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def error_of(path: Path, overrides: dict | None = None) -> str:
    with pytest.raises(InputError) as caught:
        load_run_file(path, overrides)
    message = str(caught.value)
    assert "\n" not in message
    return message


def line_of(text: str, needle: str) -> int:
    """The line (from 1) of the first line starting with ``needle``, found by plain search."""
    return next(n for n, line in enumerate(text.splitlines(), 1) if line.startswith(needle))


def with_line(text: str, section: str, line: str) -> str:
    """``text`` with ``line`` first under ``section``, adding the section when absent."""
    if f"{section}\n" not in text:
        return text + f"\n{section}\n{line}\n"
    return text.replace(f"{section}\n", f"{section}\n{line}\n")


# --- reading ----------------------------------------------------------------------


def test_minimal_file_gets_defaults_and_resolves_paths_against_its_folder(tmp_path, monkeypatch):
    folder = tmp_path / "runs"
    folder.mkdir()
    path = write(folder, MINIMAL)
    monkeypatch.chdir(tmp_path)  # the working directory must not matter
    run = load_run_file(Path("runs/run.toml"))
    assert run.input.path == folder.resolve() / "data.csv"
    assert run.output.dir == folder.resolve() / "out"
    assert run.panel.entity == ["firm_id"]
    assert run.model.x == ["capital", "staff"]
    # defaults come from the option objects the run file maps onto
    assert run.checks.low_within_ratio == Thresholds().low_within_ratio
    assert run.checks.constant_rtol == Thresholds().constant_rtol
    assert run.output.transforms == ["within", "between", "quasi"]
    assert run.clean.window == (None, None)
    assert run.read_options() == ReadOptions()
    assert run.thresholds() == Thresholds()
    assert run.source == Path("runs/run.toml")
    assert path.exists()


def test_every_key_is_read(tmp_path):
    text = (MINIMAL + """
[contract]
schema = "/abs/firm_year.yaml"
validate_outputs = true

[checks]
fail_on = "warning"
low_within_ratio = 0.1
constant_rtol = 1e-6

[checks.severity]
period-holes = "error"
contract-check-failed = "warning"

[clean]
duplicates = "keep-last"
normalise_ids = "trim-fold"
singletons = "drop"
balance = "largest-block"
window = ["2011", ""]

[derive]
lag = ["sales:1", " capital : 2 "]
lead = ["sales:1"]
diff = ["sales", "staff:2"]
""").replace("[input]\n", '[input]\nformat = "csv"\ndelimiter = ";"\ndecimal_comma = true\n'
            'missing_tokens = ["n/a", "-"]\n').replace(
        'time = "year"\n', 'time = "year"\nfreq = "year"\n').replace(
        'dir = "out"\n', 'dir = "out"\ntransforms = ["twoway"]\nmethod = "nerlove"\n'
        'format = "csv"\nforce = true\n')
    run = load_run_file(write(tmp_path, text))
    assert run.read_options() == ReadOptions(input_format="csv", delimiter=";",
                                             decimal_comma=True, missing_tokens=("n/a", "-"))
    assert run.panel.freq == "year"
    assert run.contract.schema == Path("/abs/firm_year.yaml")
    assert run.contract.validate_outputs is True
    assert run.checks.fail_on == "warning"
    assert run.thresholds() == Thresholds(low_within_ratio=0.1, constant_rtol=1e-6)
    assert run.checks.severity == {"period-holes": "error", "contract-check-failed": "warning"}
    assert (run.clean.duplicates, run.clean.normalise_ids, run.clean.singletons,
            run.clean.balance) == ("keep-last", "trim-fold", "drop", "largest-block")
    assert run.clean.window == ("2011", None)
    assert run.derive.lag == ["sales:1", "capital:2"]
    assert run.derive.diff == ["sales", "staff:2"]
    assert (run.output.transforms, run.output.method, run.output.format, run.output.force) == (
        ["twoway"], "nerlove", "csv", True)


def test_entity_list_and_whole_number_window(tmp_path):
    text = MINIMAL.replace('entity = "firm_id"', 'entity = ["country", "firm_id"]') + (
        "[clean]\nwindow = [2010, 2015]\n")
    run = load_run_file(write(tmp_path, text))
    assert run.panel.entity == ["country", "firm_id"]
    assert run.clean.window == ("2010", "2015")


# --- errors name the key and its line ----------------------------------------------


@pytest.mark.parametrize("section,line_text,names", [
    ("[model]", 'colour = "red"', "model.colour"),
    ("[output]", "compress = true", "output.compress"),
    ("[checks]", "fail_at = 'error'", "checks.fail_at"),
])
def test_unknown_key_names_key_and_line(tmp_path, section, line_text, names):
    text = with_line(MINIMAL, section, line_text)
    message = error_of(write(tmp_path, text))
    assert names in message
    assert f"run.toml:{line_of(text, line_text)}:" in message
    assert "unknown key" in message


def test_unknown_section_and_top_level_key(tmp_path):
    text = MINIMAL + "\n[plots]\nwidth = 3\n"
    message = error_of(write(tmp_path, text))
    assert "[plots]" in message and f":{line_of(text, '[plots]')}:" in message
    text = 'title = "x"\n' + MINIMAL
    message = error_of(write(tmp_path, text))
    assert "'title'" in message and "run.toml:1:" in message


def test_unknown_finding_id_in_severity_table(tmp_path):
    text = MINIMAL + "\n[checks.severity]\nperiod-holes = \"error\"\nperiod-hole = \"info\"\n"
    message = error_of(write(tmp_path, text))
    assert "'period-hole'" in message
    assert f"run.toml:{line_of(text, 'period-hole =')}:" in message
    text = MINIMAL + "\n[checks.severity]\nperiod-holes = \"fatal\"\n"
    message = error_of(write(tmp_path, text))
    assert "checks.severity.period-holes" in message and "'fatal'" in message
    assert f":{line_of(text, 'period-holes =')}:" in message


@pytest.mark.parametrize("section,line_text,key,allowed", [
    ("[checks]", 'low_within_ratio = "high"', "checks.low_within_ratio", "a number in [0, 1]"),
    ("[checks]", "low_within_ratio = 1.5", "checks.low_within_ratio", "a number in [0, 1]"),
    ("[checks]", "constant_rtol = 0", "checks.constant_rtol", "a number in (0, 1)"),
    ("[checks]", "constant_rtol = nan", "checks.constant_rtol", "a number in (0, 1)"),
    ("[checks]", 'fail_on = "info"', "checks.fail_on", "error, warning"),
    ("[output]", 'force = "yes"', "output.force", "true or false"),
    ("[output]", 'transforms = ["within", "fourier"]', "output.transforms", "twoway"),
    ("[output]", 'transforms = ["within", "within"]', "output.transforms", "distinct"),
    ("[output]", 'method = "ols"', "output.method", "swamy-arora"),
    ("[clean]", 'window = ["2010"]', "clean.window", "two period labels"),
    ("[clean]", 'duplicates = "drop"', "clean.duplicates", "keep-first"),
    ("[derive]", 'lag = ["sales"]', "derive.lag", "var:k"),
    ("[derive]", 'lead = ["sales:0"]', "derive.lead", ">= 1"),
    ("[derive]", 'diff = ["sales:x"]', "derive.diff", "var:k"),
    ("[input]", 'delimiter = ";;"', "input.delimiter", "one character"),
    ("[input]", "missing_tokens = [1, 2]", "input.missing_tokens", "texts"),
    ("[panel]", 'freq = "decade"', "panel.freq", "quarter"),
    ("[panel]", "time = 1990", "panel.time", "text"),
    ("[model]", 'x = ["a", "a"]', "model.x", "distinct column names"),
    ("[panel]", 'entity = ""', "panel.entity", "column name"),
])
def test_wrong_type_or_value_names_key_line_and_allowed(tmp_path, section, line_text, key,
                                                        allowed):
    # a key set twice is a TOML error, so replace the minimal file's own line when present
    own = line_text.split(" = ")[0]
    base = "\n".join(line for line in MINIMAL.splitlines()
                     if not line.startswith(f"{own} ")) + "\n"
    text = with_line(base, section, line_text)
    message = error_of(write(tmp_path, text))
    assert key in message
    assert allowed in message
    assert f"run.toml:{line_of(text, line_text)}:" in message


def test_toml_syntax_error_has_file_and_line(tmp_path):
    text = MINIMAL.replace('y = "sales"', 'y = "sales')
    message = error_of(write(tmp_path, text))
    assert "not valid TOML" in message
    assert f"run.toml:{line_of(text, 'y = ')}:" in message


def test_missing_file_and_not_utf8(tmp_path):
    assert "no such run file" in error_of(tmp_path / "absent.toml")
    path = tmp_path / "latin.toml"
    path.write_bytes(b'[model]\ny = "caf\xe9"\n')
    assert "latin.toml:2:" in error_of(path)


def test_missing_required_key_names_section_key_unless_overridden(tmp_path):
    text = MINIMAL.replace('y = "sales"\n', "")
    path = write(tmp_path, text)
    message = error_of(path)
    assert "model.y is required" in message and "[model]" in message
    assert load_run_file(path, {"model.y": "sales"}).model.y == "sales"
    text = MINIMAL.replace('[output]\ndir = "out"\n', "")
    message = error_of(write(tmp_path, text))
    assert "output.dir is required" in message


def test_cross_key_errors(tmp_path):
    text = MINIMAL.replace('x = ["capital", "staff"]', 'x = ["capital", "sales"]')
    message = error_of(write(tmp_path, text))
    assert "model.y 'sales' is also in model.x" in message
    assert f":{line_of(text, 'x = [')}:" in message
    text = MINIMAL.replace('x = ["capital", "staff"]', 'x = ["year"]')
    assert "cannot also be" in error_of(write(tmp_path, text))
    text = MINIMAL.replace('x = ["capital", "staff"]', "x = []")
    assert "model.x" in error_of(write(tmp_path, text))


# --- overrides --------------------------------------------------------------------


def test_command_line_overrides_win_and_none_means_not_given(tmp_path, monkeypatch):
    text = MINIMAL + '\n[checks]\nfail_on = "error"\n[checks.severity]\nperiod-holes = "error"\n'
    run = load_run_file(write(tmp_path, text))
    monkeypatch.chdir(tmp_path)
    merged = run.merged({
        "model.y": "staff",
        "model.x": "capital,sales",
        "panel.entity": None,
        "checks.fail_on": "warning",
        "checks.severity": {"var-thin-within": "warning"},
        "output.dir": "elsewhere",
        "input.delimiter": "\\t",
    })
    assert merged.model.y == "staff"
    assert merged.model.x == ["capital", "sales"]
    assert merged.panel.entity == ["firm_id"]  # None kept the file's value
    assert merged.checks.fail_on == "warning"
    assert merged.checks.severity == {"period-holes": "error", "var-thin-within": "warning"}
    assert merged.output.dir == Path("elsewhere")  # command-line paths stay as given
    assert merged.input.delimiter == "\t"
    assert run.model.y == "sales"  # the original is unchanged
    assert load_run_file(tmp_path / "run.toml", {"output.force": True}).output.force is True


def test_bad_override_names_key(tmp_path):
    run = load_run_file(write(tmp_path, MINIMAL))
    with pytest.raises(InputError, match=r"command-line value for output\.method must be one of"):
        run.merged({"output.method": "ols"})
    with pytest.raises(InputError, match="unknown run-file key 'output.colour'"):
        run.merged({"output.colour": "red"})
    with pytest.raises(InputError, match="model.y 'capital' is also in model.x"):
        run.merged({"model.y": "capital"})


# --- the canonical form -----------------------------------------------------------


def test_key_table_is_the_module_docstring_table_and_sections_match():
    assert config.key_table() in config.__doc__
    for section, keys in config._KEYS.items():
        names = [f.name for f in dataclasses.fields(config._SECTIONS[section])]
        assert list(keys) == names
    assert set(config.FINDING_IDS) == {*CHECK_IDS, *config.EXTRA_FINDING_IDS}


def test_to_toml_round_trip_with_every_key(tmp_path):
    run = RunFile(
        input=config.InputSection(path=Path("/data/p.csv"), format="csv", delimiter="\t",
                                  decimal_comma=True, missing_tokens=["n/a", '"q"']),
        panel=config.PanelSection(entity=["country", "firm id"], time="year", freq="year"),
        model=config.ModelSection(y="sales", x=["capital", "staff"]),
        contract=config.ContractSection(schema=Path("/s/c.yaml"), validate_outputs=True),
        checks=config.ChecksSection(fail_on="warning", low_within_ratio=0.2,
                                    constant_rtol=1e-7,
                                    severity={"period-holes": "error"}),
        clean=config.CleanSection(duplicates="mean", window=(None, "2020Q4")),
        derive=config.DeriveSection(lag=["sales:2"], diff=["sales"]),
        output=config.OutputSection(dir=Path("/out/p"), transforms=["twoway"], force=True),
    )
    text = run.to_toml()
    tomllib.loads(text)
    loaded = load_run_file(write(tmp_path, text))
    assert loaded == dataclasses.replace(run, source=loaded.source)
    # with a base folder, paths are written relative and come back the same
    relative = run.to_toml(base="/data")
    assert 'path = "p.csv"' in relative
    assert load_run_file(write(tmp_path / "..", relative, "rel.toml")).input.path == (
        (tmp_path / ".." / "p.csv").resolve())


names = st.text(st.characters(blacklist_categories=("Cs", "Cc")), min_size=1, max_size=12).filter(
    lambda s: s.strip() == s and "," not in s and s.strip())


@settings(max_examples=examples(40), deadline=None)
@given(y=names, x=st.lists(names, min_size=1, max_size=3, unique=True), time=names,
       entity=names, tokens=st.lists(names, max_size=3),
       ratio=st.floats(0, 1), rtol=st.floats(1e-15, 0.5))
def test_to_toml_round_trips_any_names(tmp_path_factory, y, x, time, entity, tokens, ratio, rtol):
    keys = {y, time, entity}
    if len(keys) < 3 or keys & set(x):
        return
    run = RunFile(
        input=config.InputSection(path=Path("/d/data.csv"), missing_tokens=tokens),
        panel=config.PanelSection(entity=[entity], time=time),
        model=config.ModelSection(y=y, x=x),
        checks=config.ChecksSection(low_within_ratio=ratio, constant_rtol=rtol),
        output=config.OutputSection(dir=Path("/d/out")),
    )
    path = write(tmp_path_factory.mktemp("rt"), run.to_toml())
    assert load_run_file(path) == dataclasses.replace(run, source=path)


def test_key_lines_follow_tables_quotes_dotted_keys_and_multiline_strings():
    text = (
        '[input]\n'                       # 1
        'path = "a.csv"\n'                # 2
        'note = """\n'                    # 3
        'fake = 1\n'                      # 4 inside a string: not a key
        '"""\n'                           # 5
        '[ checks . "severity" ]\n'       # 6
        '"period-holes" = "info"\n'       # 7
        '[panel]\n'                       # 8
        'sub.key = 2\n'                   # 9
    )
    lines = key_lines(text)
    assert lines[("input", "path")] == 2
    assert lines[("input", "note")] == 3
    assert ("input", "fake") not in lines
    assert lines[("checks", "severity")] == 6
    assert lines[("checks", "severity", "period-holes")] == 7
    assert lines[("panel", "sub", "key")] == 9


# --- the starter file -------------------------------------------------------------


def header_of(path: Path) -> list[str]:
    """Column names read with the csv module (not panelprep)."""
    with open(path, newline="", encoding="utf-8") as handle:
        first = handle.readline()
    delimiter = ";" if first.count(";") > first.count(",") else ","
    return next(csv.reader([first], delimiter=delimiter))


@pytest.mark.parametrize("fixture", sorted(p.name for p in FIXTURES.glob("*.csv")))
def test_starter_loads_and_guesses_keys_on_every_fixture(tmp_path, fixture):
    data = FIXTURES / fixture
    text = starter_run_file(data, run_dir=tmp_path)
    run = load_run_file(write(tmp_path, text))
    columns = header_of(data)
    # every fixture has the firm id first and the time column second (see fixtures/EXPECTED.md)
    assert run.panel.entity == [columns[0]] == ["firm_id"]
    assert run.panel.time == columns[1]
    assert run.input.path == data.resolve()
    assert run.model.y == columns[2]
    assert run.model.x == columns[3:]
    assert run.output.dir == tmp_path.resolve() / f"{data.stem}-prepared"
    assert run.input.decimal_comma is (fixture == "semicolon_decimal_comma.csv")
    for key in ("entity", "time", "y =", "x ="):
        assert "# guessed" in next(line for line in text.splitlines()
                                   if line.startswith(key if "=" in key else f"{key} ="))
    # every other key is there, commented out with its default and an explanation
    for section, keys in config._KEYS.items():
        for key in keys:
            if key != "severity":
                assert any(line.lstrip("# ").startswith(f"{key} = ")
                           for line in text.splitlines()), (section, key)


def test_starter_on_gaps_guesses_firm_id_and_year(tmp_path):
    text = starter_run_file(FIXTURES / "gaps.csv")
    run = load_run_file(write(tmp_path, text))
    assert run.panel.entity == ["firm_id"] and run.panel.time == "year"
    assert run.model.y == "sales" and run.model.x == ["capital", "staff"]
    assert 'entity = "firm_id"  # guessed' in text
    assert "# guessed: first numeric column as y" in text
    assert run.input.path == (FIXTURES / "gaps.csv").resolve()


def test_starter_notes_tokens_seen_in_numeric_columns(tmp_path):
    text = starter_run_file(FIXTURES / "non_numeric.csv", run_dir=tmp_path)
    line = next(line for line in text.splitlines() if "missing_tokens =" in line)
    # the fixture's sales column holds "n/a" and "-" (see fixtures/EXPECTED.md)
    assert line.startswith('# missing_tokens = ["n/a", "-"]')


@pytest.mark.parametrize("suffix", [".parquet", ".feather"])
def test_starter_on_parquet_and_arrow_with_text_ids_and_date_periods(tmp_path, suffix):
    frame = pd.DataFrame({
        "region": ["north", "north", "south", "south"],
        "output": [1.5, 2.5, 3.5, 4.5],
        "plantCode": ["p1", "p1", "p2", "p2"],
        "when": ["2020-01-31", "2020-02-29", "2020-01-31", "2020-02-29"],
        "hours": [10, 11, 12, 13],
    })
    data = tmp_path / f"plants{suffix}"
    if suffix == ".parquet":
        frame.to_parquet(data, index=False)
    else:
        frame.to_feather(data)
    text = starter_run_file(data, run_dir=tmp_path)
    run = load_run_file(write(tmp_path, text))
    # region and plantCode are both named like ids; the first text one is taken
    assert run.panel.entity == ["region"]
    assert run.panel.time == "when"  # not named like a period, but its values are dates
    assert run.model.y == "output" and run.model.x == ["hours"]
    assert run.input.path == data.resolve()
    assert '# freq = "month"' in text


def test_starter_uses_a_given_head_and_refuses_too_few_columns(tmp_path):
    data = tmp_path / "p.csv"
    data.write_text("unit,t,v\na,1,1.0\nb,1,2.0\n", encoding="utf-8")
    with pytest.raises(InputError, match="at least two columns"):
        starter_run_file(data)
    data.write_text("unit,t,v,w\na,1,1.0,3\nb,1,2.0,4\n", encoding="utf-8")
    head = pd.DataFrame({"unit": ["a"], "t": [1], "v": [1.0], "w": [3]})
    run = load_run_file(write(tmp_path, starter_run_file(data, frame_head=head)))
    assert (run.panel.entity, run.panel.time, run.model.y, run.model.x) == (
        ["unit"], "t", "v", ["w"])


# --- [names]: the columns panelprep adds -------------------------------------------------


def test_names_section_renames_added_columns_and_templates(tmp_path):
    text = MINIMAL + '\n[names]\nrow = "src_row"\ntheta = "re_theta"\nlag = "{var}_L{k}"\n'
    run = load_run_file(write(tmp_path, text))
    names = run.added_names()
    assert (names.row, names.theta, names.intercept) == ("src_row", "re_theta", "pp_intercept")
    assert names.derived("lag", "sales", 2) == "sales_L2"
    # the canonical form keeps them
    again = load_run_file(write(tmp_path, run.to_toml(tmp_path), "again.toml"))
    assert again.added_names() == names


@pytest.mark.parametrize(("line_text", "fragment"), [
    ('row = ""', "names.row must be a column name"),
    ('theta = "a{b}"', "names.theta must be a column name without braces"),
    ('lag = "{var}_lag"', "names.lag must be a name template holding {var} and {k}"),
    ('diff = "{var}_{k}_{z}"', "names.diff must be a name template"),
])
def test_bad_names_are_errors_with_their_line(tmp_path, line_text, fragment):
    text = MINIMAL + "\n[names]\n" + line_text + "\n"
    message = error_of(write(tmp_path, text))
    assert fragment in message, message
    assert f":{line_of(text, line_text)}:" in message, message


def test_starter_run_file_shows_the_names_section(tmp_path):
    text = starter_run_file(FIXTURES / "gaps.csv", run_dir=tmp_path)
    assert "[names]" in text and '# intercept = "pp_intercept"' in text
    load_run_file(write(tmp_path, text))
