"""Data safety: nothing lost or overwritten, no partial output, the input never written.

A preparation writes into a hidden folder beside ``--out`` and renames it
into place only when everything succeeded.  These tests break a run at the
last moment (a write that fails, an interrupt, a process killed outright)
and look at what is left: the previous output folder exactly as it was, no
partial one.  They also pin the refusals (an output folder that is a file,
that holds the input, that appeared during the run) and the memory guard.
"""

from __future__ import annotations

import errno
import hashlib
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

import panelprep
import panelprep.report.html
from panelprep import limits
from panelprep.cli import app
from panelprep.errors import InputError
from panelprep.io import TEMP_PREFIX, OutputFolder, read_frame
from panelprep.prepare import prepare

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
KEYS = {"entity": "firm_id", "time": "year", "y": "sales", "x": "capital,staff"}
ARGS = ["--entity", "firm_id", "--time", "year", "--y", "sales", "--x", "capital,staff"]


def snapshot(folder: Path) -> dict[str, str]:
    """Every file under ``folder`` (hidden ones too) with the SHA-256 of its bytes."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture
def data(tmp_path) -> Path:
    path = tmp_path / "panel.csv"
    path.write_bytes((FIXTURES / "clean_balanced.csv").read_bytes())
    return path


@pytest.fixture
def earlier(tmp_path, data) -> Path:
    """A finished output folder from an earlier run, plus a file of the user's in it."""
    out = tmp_path / "out"
    prepare(data, out, **KEYS)
    (out / "notes.txt").write_text("written by hand\n", encoding="utf-8")
    return out


def leftovers(parent: Path) -> list[str]:
    """Hidden temporary files and folders in ``parent`` (ours, or named after ``out`` as before)."""
    return sorted(p.name for p in parent.iterdir()
                  if p.name.startswith((TEMP_PREFIX, ".out.")))


# --- a run that fails at the end leaves the earlier output as it was -----------------------

def test_a_failing_last_data_file_leaves_the_earlier_folder_intact(tmp_path, data, earlier,
                                                                    monkeypatch):
    before = snapshot(earlier)
    calls = []

    class FullDisk(pq.ParquetWriter):
        """The disk fills while the last data file is written."""

        def __init__(self, where, *args, **kwargs):
            self.name = Path(where).name
            calls.append(self.name)
            super().__init__(where, *args, **kwargs)

        def write_table(self, table, *args, **kwargs):
            if self.name == "dropped.parquet":  # the last data file written
                raise OSError(errno.ENOSPC, "No space left on device")
            return super().write_table(table, *args, **kwargs)

    monkeypatch.setattr(pq, "ParquetWriter", FullDisk)
    result = CliRunner().invoke(app, ["prepare", str(data), *ARGS, "--out", str(earlier),
                                      "--force", "--quiet"])
    assert result.exit_code == 2, result.output
    assert isinstance(result.exception, SystemExit)
    line = result.stderr.strip()
    assert line.startswith("panelprep: error: cannot write dropped.parquet")
    assert "No space left on device" in line and "\n" not in line
    assert calls[-1] == "dropped.parquet" and len(calls) > 1  # earlier files were written
    assert snapshot(earlier) == before
    assert leftovers(tmp_path) == []


def test_a_failing_report_write_leaves_the_earlier_folder_intact(tmp_path, data, earlier,
                                                                 monkeypatch):
    # report.html is the very last file a preparation writes
    before = snapshot(earlier)

    def broken(*args, **kwargs):
        raise RuntimeError("the report renderer broke")

    monkeypatch.setattr(panelprep.report.html, "render_html", broken)
    with pytest.raises(RuntimeError, match="renderer broke"):
        prepare(data, earlier, force=True, **KEYS)
    assert snapshot(earlier) == before
    assert leftovers(tmp_path) == []


def test_an_unexpected_failure_is_one_line_through_main(tmp_path, data, earlier, monkeypatch,
                                                        capsys):
    before = snapshot(earlier)
    monkeypatch.setattr(panelprep.report.html, "render_html",
                        lambda *a, **k: (_ for _ in ()).throw(ValueError("bad\nvalue")))
    monkeypatch.setattr(sys, "argv", ["panelprep", "prepare", str(data), *ARGS, "--out",
                                      str(earlier), "--force", "--quiet"])
    saved = tmp_path / "saved"
    saved.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(saved))
    from panelprep.cli import main

    with pytest.raises(SystemExit) as stop:
        main()
    # a bug is exit 3: one line naming the file that holds the traceback
    assert stop.value.code == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("panelprep: internal error (a bug")
    assert "Traceback" not in err
    (traceback_file,) = saved.iterdir()
    assert str(traceback_file) in err and "Traceback" in traceback_file.read_text()
    assert snapshot(earlier) == before
    assert leftovers(tmp_path) == []


def test_an_interrupt_during_the_writes_leaves_no_partial_folder(tmp_path, data, monkeypatch):
    out = tmp_path / "out"
    written = []

    class Interrupted(pq.ParquetWriter):
        """Ctrl-C arrives while the third data file is written."""

        def __init__(self, where, *args, **kwargs):
            written.append(Path(where).name)
            super().__init__(where, *args, **kwargs)

        def write_table(self, table, *args, **kwargs):
            if len(written) == 3:
                raise KeyboardInterrupt
            return super().write_table(table, *args, **kwargs)

    monkeypatch.setattr(pq, "ParquetWriter", Interrupted)
    with pytest.raises(KeyboardInterrupt):
        prepare(data, out, **KEYS)
    assert not out.exists()
    assert leftovers(tmp_path) == []


def test_a_killed_run_leaves_the_earlier_folder_and_its_leftover_is_cleared(tmp_path, data,
                                                                            earlier):
    # a process killed outright runs no cleanup: its hidden folder stays, the target is untouched
    before = snapshot(earlier)
    code = ("import os, signal, sys\n"
            "from pathlib import Path\n"
            "from panelprep.io import OutputFolder\n"
            "folder = OutputFolder(Path(sys.argv[1]), [Path(sys.argv[2])], force=True)\n"
            "folder.path('clean.parquet').write_bytes(b'half a file')\n"
            "os.kill(os.getpid(), signal.SIGKILL)\n")
    env = {**os.environ, "PYTHONPATH": str(Path(panelprep.__file__).resolve().parent.parent)}
    done = subprocess.run([sys.executable, "-c", code, str(earlier), str(data)], env=env,
                          capture_output=True, timeout=120, check=False)
    assert done.returncode == -9, done.stderr
    assert snapshot(earlier) == before
    left = leftovers(tmp_path)
    assert len(left) == 1 and left[0].startswith(TEMP_PREFIX)
    # the next run for the same folder removes what the dead process left
    prepare(data, earlier, force=True, **KEYS)
    assert leftovers(tmp_path) == []
    assert "notes.txt" not in {p.name for p in earlier.iterdir()}


def test_a_leftover_of_a_live_process_is_not_touched(tmp_path):
    mine = tmp_path / f"{TEMP_PREFIX}{os.getpid()}-keep"
    mine.mkdir()
    folder = OutputFolder(tmp_path / "out", [])
    folder.abandon()
    assert mine.exists()


# --- refusals ------------------------------------------------------------------------------

def test_an_output_path_that_is_a_file_is_refused(tmp_path, data):
    target = tmp_path / "out"
    target.write_text("not a folder\n", encoding="utf-8")
    with pytest.raises(InputError, match="exists and is not a folder"):
        prepare(data, target, force=True, **KEYS)
    assert target.read_text(encoding="utf-8") == "not a folder\n"


def test_an_output_folder_holding_the_input_deeper_down_is_refused(tmp_path):
    nested = tmp_path / "a" / "b"
    nested.mkdir(parents=True)
    data = nested / "panel.csv"
    data.write_bytes((FIXTURES / "clean_balanced.csv").read_bytes())
    before = snapshot(tmp_path)
    for out in (tmp_path / "a", tmp_path / "a" / "b" / ".." / "b"):
        with pytest.raises(InputError, match="equals or contains the input"):
            prepare(data, out, force=True, **KEYS)
    assert snapshot(tmp_path) == before


def test_a_link_to_the_input_folder_is_refused(tmp_path, data):
    link = tmp_path / "elsewhere"
    link.symlink_to(tmp_path, target_is_directory=True)
    with pytest.raises(InputError, match="equals or contains the input"):
        prepare(data, link, force=True, **KEYS)
    assert data.exists() and link.is_symlink()


def test_a_linked_output_folder_is_replaced_not_emptied_through_the_link(tmp_path, data):
    real = tmp_path / "kept"
    real.mkdir()
    (real / "precious.txt").write_text("keep me\n", encoding="utf-8")
    link = tmp_path / "out"
    link.symlink_to(real, target_is_directory=True)
    prepare(data, link, force=True, **KEYS)
    assert (real / "precious.txt").read_text(encoding="utf-8") == "keep me\n"
    assert not link.is_symlink() and (link / "clean.parquet").exists()


def test_a_run_file_inside_the_output_folder_is_never_deleted(tmp_path, data):
    out = tmp_path / "out"
    out.mkdir()
    run = out / "run.toml"
    run.write_text(f'[input]\npath = "{data}"\n[panel]\nentity = ["firm_id"]\ntime = "year"\n'
                   '[model]\ny = "sales"\nx = ["capital", "staff"]\n'
                   f'[output]\ndir = "{out}"\nforce = true\n', encoding="utf-8")
    before = snapshot(out)
    result = CliRunner().invoke(app, ["prepare", "--config", str(run), "--quiet"])
    assert result.exit_code == 2
    assert "equals or contains the input" in result.stderr and "run.toml" in result.stderr
    assert snapshot(out) == before
    assert leftovers(tmp_path) == []


def test_a_folder_that_appears_during_the_run_is_not_replaced(tmp_path):
    target = tmp_path / "out"
    folder = OutputFolder(target, [])
    folder.path("clean.parquet").write_bytes(b"new")
    target.mkdir()
    (target / "theirs.txt").write_text("made meanwhile\n", encoding="utf-8")
    with pytest.raises(InputError, match="not empty"):
        folder.commit()
    folder.abandon()
    assert snapshot(target) == {"theirs.txt": hashlib.sha256(b"made meanwhile\n").hexdigest()}
    assert leftovers(tmp_path) == []


def test_an_empty_existing_folder_is_filled_without_force(tmp_path, data):
    out = tmp_path / "out"
    out.mkdir()
    prepare(data, out, **KEYS)
    assert (out / "diagnostics.json").exists()


def test_the_output_folder_gets_the_usual_permissions(tmp_path, data):
    # a temporary folder made private (0700) would stay private once renamed into place
    out = tmp_path / "out"
    prepare(data, out, **KEYS)
    usual = tmp_path / "made-by-mkdir"
    usual.mkdir()
    assert out.stat().st_mode & 0o777 == usual.stat().st_mode & 0o777


def test_a_missing_parent_folder_is_one_line(tmp_path, data):
    result = CliRunner().invoke(app, ["prepare", str(data), *ARGS, "--out",
                                      str(tmp_path / "no" / "such" / "out")])
    assert result.exit_code == 2
    assert "parent folder" in result.stderr and "does not exist" in result.stderr


# --- the input is only ever read -----------------------------------------------------------

_WATCHED: dict[str, list] = {}


def _audit_opens(event: str, args: tuple) -> None:
    # audit hooks cannot be removed, so this one only records while a test watches a path
    if not _WATCHED or event not in ("open", "os.open"):
        return
    path = str(args[0]) if args and isinstance(args[0], (str, bytes, os.PathLike)) else ""
    for watched, hits in _WATCHED.items():
        if path and os.path.realpath(path) == watched:
            mode = args[1] if event == "open" else ""
            flags = args[2] if len(args) > 2 and isinstance(args[2], int) else 0
            writes = (isinstance(mode, str) and any(c in mode for c in "wax+")) or (
                flags & (os.O_WRONLY | os.O_RDWR | os.O_APPEND | os.O_TRUNC))
            hits.append((event, mode, flags, bool(writes)))


sys.addaudithook(_audit_opens)


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_the_input_is_never_opened_for_writing(tmp_path, fmt):
    frame = read_frame(FIXTURES / "clean_balanced.csv", None, ["firm_id"], "year")
    data = tmp_path / f"panel.{fmt}"
    if fmt == "csv":
        data.write_bytes((FIXTURES / "clean_balanced.csv").read_bytes())
    else:
        frame.to_parquet(data)
    stat = data.stat()
    digest = hashlib.sha256(data.read_bytes()).hexdigest()
    hits: list = []
    _WATCHED[os.path.realpath(data)] = hits
    try:
        prepare(data, tmp_path / "out", **KEYS)
        CliRunner().invoke(app, ["audit", str(data), "-e", "firm_id", "-t", "year", "--report",
                                 str(tmp_path / "r.json")])
    finally:
        _WATCHED.clear()
    assert hits, "the hook saw no open of the input at all"
    assert [h for h in hits if h[3]] == []
    after = data.stat()
    assert (after.st_mtime_ns, after.st_size, after.st_ino) == (
        stat.st_mtime_ns, stat.st_size, stat.st_ino)
    assert hashlib.sha256(data.read_bytes()).hexdigest() == digest


# --- the memory guard ----------------------------------------------------------------------

def _panel(n_entities: int = 400, n_periods: int = 10) -> pd.DataFrame:
    rng = np.random.default_rng(5)
    return pd.DataFrame({
        "firm_id": np.repeat([f"F{i:06d}" for i in range(n_entities)], n_periods),
        "year": np.tile(np.arange(2000, 2000 + n_periods), n_entities),
        "sales": rng.normal(size=n_entities * n_periods),
        "capital": rng.normal(size=n_entities * n_periods),
    })


def test_parquet_estimate_is_near_what_pandas_holds(tmp_path):
    # outside check: pandas' own deep memory count of the frame read from the file
    frame = _panel()
    path = tmp_path / "p.parquet"
    frame.to_parquet(path)
    held = int(pd.read_parquet(path).memory_usage(deep=True, index=False).sum())
    estimate = limits.estimate_memory(path, "parquet", None, 4)
    assert 0.5 * held <= estimate.data <= 2.0 * held
    assert estimate.peak == int(estimate.data * limits.WORKING_SET_FACTOR)
    only = limits.estimate_memory(path, "parquet", ["firm_id", "year"], 4)
    assert only.data < estimate.data


def test_csv_estimate_is_near_what_pandas_holds(tmp_path):
    # outside check: pandas' deep memory count of the same CSV read with ids as text
    frame = _panel()
    path = tmp_path / "p.csv"
    frame.to_csv(path, index=False)
    held = int(pd.read_csv(path, dtype={"firm_id": "str"}).memory_usage(deep=True, index=False)
               .sum())
    estimate = limits.estimate_memory(path, "csv", None, 4)
    assert 0.5 * held <= estimate.data <= 2.5 * held


def test_available_memory_is_what_the_kernel_reports(monkeypatch):
    monkeypatch.delenv(limits.MEMORY_ENV, raising=False)
    available = limits.available_memory()
    if not Path("/proc/meminfo").exists():
        assert available is None
        return
    # outside check: the physical memory the C library reports
    total = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert 0 < available <= total


@pytest.mark.parametrize(("text", "size"), [("1000", 1000), ("512K", 512 << 10),
                                            ("1.5G", 3 << 29), ("8GiB", 8 << 30), ("2t", 2 << 40),
                                            (" 64 mb ", 64 << 20)])
def test_memory_limit_sizes(text, size):
    assert limits.parse_size(text) == size


def test_the_guard_stops_before_reading_and_can_be_turned_off(tmp_path, data, monkeypatch):
    monkeypatch.setenv(limits.MEMORY_ENV, "2K")
    with pytest.raises(InputError, match=r"would need about .* but 2 KiB is available"):
        prepare(data, tmp_path / "out", **KEYS)
    assert not (tmp_path / "out").exists()
    monkeypatch.setenv(limits.MEMORY_ENV, "off")
    assert prepare(data, tmp_path / "out", **KEYS).verdict == "pass"


def test_the_guard_message_names_estimate_and_availability(tmp_path, monkeypatch):
    frame = _panel()
    path = tmp_path / "p.parquet"
    frame.to_parquet(path)
    estimate = limits.estimate_memory(path, "parquet", None, 4)
    monkeypatch.setenv(limits.MEMORY_ENV, str(estimate.peak - 1))
    result = CliRunner().invoke(app, ["audit", str(path), "-e", "firm_id", "-t", "year"])
    assert result.exit_code == 2
    assert limits.format_size(estimate.peak) in result.stderr
    assert limits.format_size(estimate.peak - 1) in result.stderr
    monkeypatch.setenv(limits.MEMORY_ENV, str(estimate.peak))
    result = CliRunner().invoke(app, ["audit", str(path), "-e", "firm_id", "-t", "year"])
    assert result.exit_code == 0, result.stderr


def test_diagnostics_of_a_refused_run_are_not_written(tmp_path, data, monkeypatch):
    monkeypatch.setenv(limits.MEMORY_ENV, "1K")
    report = tmp_path / "r.json"
    result = CliRunner().invoke(app, ["audit", str(data), "-e", "firm_id", "-t", "year",
                                      "--report", str(report)])
    assert result.exit_code == 2 and not report.exists()
