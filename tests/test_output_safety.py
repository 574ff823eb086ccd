"""Output safety of the ETL gate, through real processes where a user would meet it.

- a failed gate never replaces or empties ``--out``: its diagnostics go to
  ``OUT.failed`` (or ``--failed-out``) and the earlier output stays byte for byte;
- nothing written (report, run file, output folder, temporary name) can be an
  input, whatever name it goes by (hard links, symbolic links);
- two runs committing into one folder never silently replace each other;
- long names, a parent that is a file, and Ctrl-C each end with one true line.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

from panelprep import io as pio
from panelprep.errors import InputError
from panelprep.io import DIAGNOSTIC_FILES, TEMP_PREFIX, OutputFolder, write_file

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
GOOD = FIXTURES / "clean_balanced.csv"
# two keys on five rows disagree: with no duplicates policy the gate fails (exit 1)
BAD = FIXTURES / "conflicting_duplicates.csv"
MODEL = ["-e", "firm_id", "-t", "year", "--y", "sales", "--x", "capital,staff"]


def _command() -> list[str]:
    beside = Path(sys.executable).with_name("panelprep")
    found = str(beside) if beside.exists() else shutil.which("panelprep")
    return [found] if found else [sys.executable, "-c", "from panelprep.cli import main; main()"]


COMMAND = _command()


def cli(*args, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([*COMMAND, *map(str, args)], capture_output=True, text=True,
                          timeout=300, check=False, cwd=cwd)


def snapshot(folder: Path) -> dict[str, str]:
    """Every file under ``folder`` with the SHA-256 of its bytes."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def one_line(done: subprocess.CompletedProcess, code: int, *fragments: str) -> str:
    assert done.returncode == code, (done.returncode, done.stderr)
    assert "Traceback" not in done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    for fragment in fragments:
        assert fragment in lines[0], lines[0]
    return lines[0]


def temporaries(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if p.name.startswith((TEMP_PREFIX, ".out.")))


@pytest.fixture
def good_run(tmp_path) -> Path:
    """A passing preparation into ``tmp_path/out``."""
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    out = tmp_path / "out"
    done = cli("prepare", data, *MODEL, "--out", out, "--quiet")
    assert done.returncode == 0, done.stderr
    assert (out / "clean.parquet").exists()
    return out


@pytest.fixture
def bad_data(tmp_path) -> Path:
    path = tmp_path / "bad.csv"
    path.write_bytes(BAD.read_bytes())
    return path


# --- A: a failed gate never destroys good data ---------------------------------------------

def _assert_failed_into(done, out: Path, failed: Path, before: dict[str, str],
                        finding: str = "key-conflict") -> None:
    line = one_line(done, 1, f"the gate failed ({finding})", f" {out} was left as it was",
                    f"the diagnostics are in {failed}")
    assert not line.startswith("panelprep: error")
    assert snapshot(out) == before
    assert {p.name for p in failed.iterdir()} == DIAGNOSTIC_FILES
    document = json.loads((failed / "diagnostics.json").read_text(encoding="utf-8"))
    assert document["verdict"] == "fail" and document["files"] == []
    assert f"written to {failed}" in done.stdout
    assert temporaries(out.parent) == []


def test_a_failing_run_with_force_leaves_the_good_output_byte_identical(good_run, bad_data):
    before = snapshot(good_run)
    done = cli("prepare", bad_data, *MODEL, "--out", good_run, "--force", "--quiet")
    _assert_failed_into(done, good_run, good_run.with_name("out.failed"), before)


def test_a_failing_run_without_force_leaves_the_good_output_byte_identical(good_run, bad_data):
    before = snapshot(good_run)
    done = cli("prepare", bad_data, *MODEL, "--out", good_run, "--quiet")
    one_line(done, 2, "not empty", "--force")
    assert snapshot(good_run) == before
    assert not good_run.with_name("out.failed").exists()


def test_a_failing_run_leaves_an_empty_output_folder_empty(tmp_path, bad_data):
    out = tmp_path / "out"
    out.mkdir()
    done = cli("prepare", bad_data, *MODEL, "--out", out, "--quiet")
    _assert_failed_into(done, out, tmp_path / "out.failed", {})
    assert list(out.iterdir()) == []


def test_a_failing_run_creates_no_output_folder(tmp_path, bad_data):
    done = cli("prepare", bad_data, *MODEL, "--out", tmp_path / "out", "--quiet")
    assert done.returncode == 1, done.stderr
    assert not (tmp_path / "out").exists() and (tmp_path / "out.failed").is_dir()


def test_a_failing_run_file_with_force_true_leaves_the_good_output(tmp_path, good_run, bad_data):
    before = snapshot(good_run)
    run = tmp_path / "run.toml"
    run.write_text(f'[input]\npath = "{bad_data.name}"\n[panel]\nentity = "firm_id"\n'
                   'time = "year"\n[model]\ny = "sales"\nx = ["capital", "staff"]\n'
                   '[output]\ndir = "out"\nforce = true\n', encoding="utf-8")
    done = cli("prepare", "--config", run, "--quiet")
    _assert_failed_into(done, good_run, good_run.with_name("out.failed"), before)


def test_the_failed_folder_is_replaced_each_time_and_can_be_named(tmp_path, good_run, bad_data):
    before = snapshot(good_run)
    failed = tmp_path / "out.failed"
    first = cli("prepare", bad_data, *MODEL, "--out", good_run, "--force", "--quiet")
    assert first.returncode == 1
    # a second failure, for another reason (warnings fail too), replaces the first's diagnostics
    gaps = tmp_path / "gaps.csv"
    gaps.write_bytes((FIXTURES / "gaps.csv").read_bytes())
    second = cli("prepare", gaps, *MODEL, "--out", good_run, "--force", "--fail-on", "warning",
                 "--quiet")
    _assert_failed_into(second, good_run, failed, before, finding="period-holes")
    document = json.loads((failed / "diagnostics.json").read_text(encoding="utf-8"))
    assert document["input"]["path"].endswith("gaps.csv")
    # a folder of the user's choosing, by option and by run-file key
    chosen = tmp_path / "why"
    done = cli("prepare", bad_data, *MODEL, "--out", good_run, "--force", "--failed-out",
               chosen, "--quiet")
    _assert_failed_into(done, good_run, chosen, before)
    run = tmp_path / "run.toml"
    run.write_text(f'[input]\npath = "{bad_data.name}"\n[panel]\nentity = "firm_id"\n'
                   'time = "year"\n[model]\ny = "sales"\nx = ["capital", "staff"]\n'
                   '[output]\ndir = "out"\nforce = true\nfailed_dir = "rejected"\n',
                   encoding="utf-8")
    done = cli("prepare", "--config", run, "--quiet")
    _assert_failed_into(done, good_run, tmp_path / "rejected", before)


def test_a_failed_folder_holding_other_files_is_refused_before_the_run(tmp_path, good_run,
                                                                       bad_data):
    before = snapshot(good_run)
    failed = tmp_path / "out.failed"
    failed.mkdir()
    (failed / "mine.txt").write_text("the user's\n", encoding="utf-8")
    done = cli("prepare", bad_data, *MODEL, "--out", good_run, "--force", "--quiet")
    one_line(done, 2, str(failed), "other than a failed run's", "--failed-out")
    assert snapshot(good_run) == before
    assert snapshot(failed) == {"mine.txt": hashlib.sha256(b"the user's\n").hexdigest()}


@pytest.mark.parametrize("inside", ["out", "out/sub", "."])
def test_a_failed_folder_related_to_the_output_folder_is_refused(tmp_path, good_run, bad_data,
                                                                inside):
    before = snapshot(good_run)
    done = cli("prepare", bad_data, *MODEL, "--out", good_run, "--force", "--failed-out",
               tmp_path / inside, "--quiet")
    assert done.returncode == 2, done.stderr
    assert snapshot(good_run) == before


# --- B: the input can never be overwritten -------------------------------------------------

@pytest.mark.parametrize("option", ["--report", "--report-html"])
def test_a_report_named_like_the_input_less_a_suffix_leaves_the_input(tmp_path, option):
    # the report's temporary name used to be REPORT.partial: here, the input's own name
    data = tmp_path / "panel.csv.partial"
    data.write_bytes(GOOD.read_bytes())
    report = tmp_path / "panel.csv"
    done = cli("audit", data, "-e", "firm_id", "-t", "year", option, report, "--quiet")
    assert done.returncode == 0, done.stderr
    assert data.read_bytes() == GOOD.read_bytes()
    assert report.stat().st_size > 0 and report.read_bytes() != GOOD.read_bytes()
    assert temporaries(tmp_path) == []


@pytest.mark.parametrize("option", ["--report", "--report-html"])
@pytest.mark.parametrize("link", ["hard", "symbolic"])
def test_a_report_that_is_the_input_under_another_name_is_refused(tmp_path, option, link):
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    other = tmp_path / "report.json"
    if link == "hard":
        os.link(data, other)
    else:
        other.symlink_to(data)
    done = cli("audit", data, "-e", "firm_id", "-t", "year", option, other, "--quiet")
    one_line(done, 2, str(other), "would overwrite the input", str(data))
    assert data.read_bytes() == GOOD.read_bytes()
    assert os.path.samefile(data, other)
    assert done.stdout == ""  # refused before the audit ran


@pytest.mark.parametrize("link", ["hard", "symbolic"])
def test_draft_never_writes_its_run_file_over_the_data(tmp_path, link):
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    run = tmp_path / "run.toml"
    if link == "hard":
        os.link(data, run)
    else:
        run.symlink_to(data)
    done = cli("draft", data, "-o", run, "--force")
    one_line(done, 2, str(run), "would overwrite the input", str(data))
    assert data.read_bytes() == GOOD.read_bytes()
    assert os.path.samefile(data, run)


def test_draft_with_force_replaces_an_ordinary_run_file(tmp_path):
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    run = tmp_path / "run.toml"
    run.write_text("old\n", encoding="utf-8")
    assert cli("draft", data, "-o", run).returncode == 2
    assert run.read_text(encoding="utf-8") == "old\n"
    done = cli("draft", data, "-o", run, "--force")
    assert done.returncode == 0, done.stderr
    assert "[input]" in run.read_text(encoding="utf-8")
    assert temporaries(tmp_path) == []


def test_a_run_file_hard_linked_into_the_output_folder_is_refused(tmp_path):
    # the run file is read from elsewhere, but a hard link of it lives in the output folder
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    out = tmp_path / "out"
    out.mkdir()
    (out / "old.txt").write_text("earlier\n", encoding="utf-8")
    run = tmp_path / "run.toml"
    run.write_text(f'[input]\npath = "{data}"\n[panel]\nentity = "firm_id"\ntime = "year"\n'
                   '[model]\ny = "sales"\nx = ["capital", "staff"]\n'
                   f'[output]\ndir = "{out}"\nforce = true\n', encoding="utf-8")
    os.link(run, out / "run-copy.toml")
    before = snapshot(out)
    done = cli("prepare", "--config", out / "run-copy.toml", "--quiet")
    one_line(done, 2, "equals or contains the input")
    assert snapshot(out) == before


def test_a_temporary_name_never_takes_an_existing_file(tmp_path, monkeypatch):
    # the first random name drawn is taken by someone's file: it is skipped, never written
    taken = tmp_path / f"{TEMP_PREFIX}{os.getpid()}-aaaaaaaa"
    taken.write_text("someone's\n", encoding="utf-8")
    names = iter(["aaaaaaaa", "bbbbbbbb"])
    monkeypatch.setattr(pio.secrets, "token_hex", lambda n: next(names))
    write_file(tmp_path / "report.json", "{}\n")
    assert taken.read_text(encoding="utf-8") == "someone's\n"
    assert (tmp_path / "report.json").read_text(encoding="utf-8") == "{}\n"


# --- C: two commits into one folder --------------------------------------------------------

def _folder_with(target: Path, marker: str, force: bool = False) -> OutputFolder:
    folder = OutputFolder(target, [], force=force)
    folder.path("who.txt").write_text(marker, encoding="utf-8")
    return folder


@pytest.mark.parametrize("moment", range(1, 7))
def test_a_rival_committing_at_any_moment_is_never_replaced(tmp_path, monkeypatch, moment):
    # both runs passed every check; the rival lands its folder the moment the other run
    # touches the target for the MOMENT-th time (stat, lstat, rename, rmdir, unlink), so
    # each step of the commit is tried as the worst moment
    target = tmp_path / "out"
    rival, late = _folder_with(target, "rival"), _folder_with(target, "late")
    touches, outcome = [], {}

    def touched(path) -> None:
        if os.fspath(path) not in (str(target), os.fsencode(target)) or "rival" in outcome:
            return
        touches.append(path)
        if len(touches) == moment:
            _attempt("rival", rival)

    def _attempt(name: str, folder: OutputFolder) -> None:
        outcome[name] = "trying"
        try:
            folder.commit()
            outcome[name] = "committed"
        except InputError as err:
            folder.abandon()
            outcome[name] = str(err)

    def watch(module, name: str, position: int) -> None:
        real = getattr(module, name)

        def watched(*args, **kwargs):
            touched(args[position])
            return real(*args, **kwargs)

        monkeypatch.setattr(module, name, watched)

    for name in ("stat", "lstat", "rmdir", "unlink"):
        watch(os, name, 0)
    for name in ("rename", "replace"):
        watch(os, name, 1)
    if hasattr(pio, "_rename"):
        watch(pio, "_rename", 1)
    _attempt("late", late)
    if "rival" not in outcome:
        _attempt("rival", rival)
    won = [name for name, what in outcome.items() if what == "committed"]
    assert len(won) == 1, outcome
    lost = "late" if won == ["rival"] else "rival"
    assert "appeared during the run" in outcome[lost] or "not empty" in outcome[lost], outcome
    assert snapshot(target) == {"who.txt": hashlib.sha256(won[0].encode()).hexdigest()}
    assert temporaries(tmp_path) == []


@pytest.mark.parametrize("atomic", [True, False], ids=["renameat2", "lock-file"])
def test_concurrent_commits_without_force_leave_exactly_one(tmp_path, monkeypatch, atomic):
    if not atomic:
        monkeypatch.setattr(pio, "_renameat2", None)
    elif pio._renameat2 is None:
        pytest.skip("no renameat2 on this system")
    target = tmp_path / "out"

    def commit(folder: OutputFolder, start: threading.Barrier, outcome: dict, i: int) -> None:
        start.wait()
        try:
            folder.commit()
            outcome[i] = "committed"
        except InputError as err:
            folder.abandon()
            outcome[i] = str(err)

    for _ in range(5):
        folders = [_folder_with(target, f"run {i}") for i in range(8)]
        start = threading.Barrier(len(folders))
        outcome: dict[int, str] = {}
        threads = [threading.Thread(target=commit, args=(f, start, outcome, i))
                   for i, f in enumerate(folders)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        won = [i for i, what in outcome.items() if what == "committed"]
        assert len(won) == 1, outcome
        assert all("appeared during the run" in what for i, what in outcome.items()
                   if i not in won)
        assert snapshot(target) == {"who.txt": hashlib.sha256(
            f"run {won[0]}".encode()).hexdigest()}
        assert temporaries(tmp_path) == []
        shutil.rmtree(target)


@pytest.mark.parametrize("atomic", [True, False], ids=["renameat2", "lock-file"])
def test_concurrent_commits_with_force_always_leave_one_complete_folder(tmp_path, monkeypatch,
                                                                        atomic):
    if not atomic:
        monkeypatch.setattr(pio, "_renameat2", None)
    target = tmp_path / "out"
    target.mkdir()
    (target / "who.txt").write_text("earlier", encoding="utf-8")
    folders = [_folder_with(target, f"run {i}", force=True) for i in range(6)]
    start = threading.Barrier(len(folders))
    seen: list[str] = []
    stop = threading.Event()

    def watch() -> None:
        # whenever anyone looks, there is a complete folder at the target
        while not stop.is_set():
            try:
                seen.append((target / "who.txt").read_text(encoding="utf-8"))
            except FileNotFoundError:
                seen.append("NOTHING")

    def commit(folder: OutputFolder) -> None:
        start.wait()
        folder.commit()

    watcher = threading.Thread(target=watch)
    watcher.start()
    threads = [threading.Thread(target=commit, args=(f,)) for f in folders]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    stop.set()
    watcher.join()
    final = (target / "who.txt").read_text(encoding="utf-8")
    assert final.startswith("run ")
    assert temporaries(tmp_path) == []
    if atomic:
        # swapped in one step: never a moment without a folder at the target
        assert "NOTHING" not in seen


def test_a_failed_rename_under_force_puts_the_old_folder_back(tmp_path, monkeypatch):
    target = tmp_path / "out"
    target.mkdir()
    (target / "who.txt").write_text("earlier", encoding="utf-8")
    before = snapshot(target)
    folder = _folder_with(target, "new", force=True)
    monkeypatch.setattr(pio, "_renameat2", None)  # the move-aside path
    real_rename = os.rename

    def failing(source, dest):
        if Path(source) == folder.temp:
            raise OSError(28, "No space left on device")
        return real_rename(source, dest)

    monkeypatch.setattr(os, "rename", failing)
    with pytest.raises(OSError):
        folder.commit()
    folder.abandon()
    assert snapshot(target) == before
    assert temporaries(tmp_path) == []


def test_two_processes_preparing_into_one_folder_never_replace_each_other(tmp_path):
    # same data, one writes Parquet and one CSV, so the survivor can be told apart
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    out = tmp_path / "out"
    runs = {fmt: subprocess.Popen([*COMMAND, "prepare", str(data), *MODEL, "--out", str(out),
                                   "--format", fmt, "--quiet"],
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            for fmt in ("parquet", "csv")}
    done = {fmt: (run.wait(timeout=300), run.stderr.read()) for fmt, run in runs.items()}
    for run in runs.values():
        run.stdout.close()
        run.stderr.close()
    codes = sorted(code for code, _ in done.values())
    assert codes == [0, 2], done
    winner = next(fmt for fmt, (code, _) in done.items() if code == 0)
    _, loser_err = next(v for v in done.values() if v[0] == 2)
    assert ("appeared during the run" in loser_err or "not empty" in loser_err), loser_err
    assert len(loser_err.strip().splitlines()) == 1
    assert (out / f"clean.{winner}").exists()
    document = json.loads((out / "diagnostics.json").read_text(encoding="utf-8"))
    assert {f["name"] for f in document["files"]} <= {p.name for p in out.iterdir()}
    assert temporaries(tmp_path) == []


# --- D: long names, a parent that is a file, Ctrl-C ----------------------------------------

def test_a_250_byte_output_name_works(tmp_path):
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    out = tmp_path / ("o" * 250)
    done = cli("prepare", data, *MODEL, "--out", out, "--quiet")
    assert done.returncode == 0, done.stderr
    assert (out / "clean.parquet").exists()
    assert temporaries(tmp_path) == []
    # and a 250-byte report
    report = tmp_path / ("r" * 245 + ".json")
    done = cli("audit", data, "-e", "firm_id", "-t", "year", "--report", report, "--quiet")
    assert done.returncode == 0, done.stderr
    assert json.loads(report.read_text(encoding="utf-8"))["verdict"] == "pass"


def test_a_failed_gate_with_a_250_byte_output_name_says_where_to_put_diagnostics(tmp_path,
                                                                               bad_data):
    out = tmp_path / ("o" * 250)
    done = cli("prepare", bad_data, *MODEL, "--out", out, "--quiet")
    # OUT.failed would be 257 bytes, over the file system's limit
    one_line(done, 2, "the gate failed", "left as it was", "--failed-out")
    assert not out.exists()
    done = cli("prepare", bad_data, *MODEL, "--out", out, "--failed-out", tmp_path / "why",
               "--quiet")
    assert done.returncode == 1, done.stderr
    assert (tmp_path / "why" / "diagnostics.json").exists()


@pytest.mark.parametrize("where", ["panel.csv/sub", "panel.csv/sub/deeper"])
def test_an_output_folder_under_a_file_says_the_parent_is_a_file(tmp_path, where):
    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    done = cli("prepare", data, *MODEL, "--out", tmp_path / where, "--quiet")
    one_line(done, 2, f"{data} is a file, not a folder")
    done = cli("audit", data, "-e", "firm_id", "-t", "year", "--report",
               tmp_path / where / "r.json", "--quiet")
    one_line(done, 2, f"{data} is a file, not a folder")
    assert data.read_bytes() == GOOD.read_bytes()


def _large_panel(path: Path, rows: int = 600_000) -> None:
    """An invented panel big enough that a preparation takes seconds, not milliseconds."""
    rng = np.random.default_rng(11)
    firms = rows // 20
    names = pa.array([f"F{i:06d}" for i in range(firms)]).take(
        pa.array(np.repeat(np.arange(firms), 20)))
    pacsv.write_csv(pa.table({"firm_id": names,
                              "year": np.tile(np.arange(2000, 2020), firms),
                              "sales": rng.normal(size=rows), "capital": rng.normal(size=rows),
                              "staff": rng.normal(size=rows)}), path)


def test_ctrl_c_during_a_run_is_one_line_and_exit_130(tmp_path):
    data = tmp_path / "big.csv"
    _large_panel(data)
    out = tmp_path / "out"
    run = subprocess.Popen([*COMMAND, "prepare", str(data), *MODEL, "--out", str(out),
                            "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           text=True)
    # the hidden folder appears once the run has started working; interrupt it then
    deadline = time.monotonic() + 120
    while not any(p.name.startswith(TEMP_PREFIX) for p in tmp_path.iterdir()):
        assert run.poll() is None, run.communicate()
        assert time.monotonic() < deadline, "the run never started"
        time.sleep(0.005)
    run.send_signal(signal.SIGINT)
    _, stderr = run.communicate(timeout=300)
    assert run.returncode == 130, stderr
    assert stderr.strip().splitlines() == ["panelprep: interrupted; nothing was written"]
    assert not out.exists()
    assert temporaries(tmp_path) == []


def test_ctrl_c_after_a_commit_says_what_was_written(tmp_path, monkeypatch, capsys):
    # an interrupt arriving after the output was put in place must not claim nothing was
    from panelprep import cli as cli_module

    data = tmp_path / "panel.csv"
    data.write_bytes(GOOD.read_bytes())
    out = tmp_path / "out"
    real = cli_module._print_preparation

    def interrupted(*args, **kwargs):
        real(*args, **kwargs)
        raise KeyboardInterrupt

    monkeypatch.setattr(cli_module, "_print_preparation", interrupted)
    monkeypatch.setattr(pio, "_written", [])
    monkeypatch.setattr(sys, "argv", ["panelprep", "prepare", str(data), *MODEL, "--out",
                                      str(out), "--quiet"])
    with pytest.raises(SystemExit) as stop:
        cli_module.main()
    assert stop.value.code == 130
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"panelprep: interrupted after writing {out}; nothing else was written"]
    assert (out / "clean.parquet").exists()
