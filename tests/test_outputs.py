"""No input lost, no partial output (issue 19, items 1, 2, 4, 5, 6 and the full standard output of 15).

Every output a run writes is claimed before the work, staged beside its target and
published together with the others (auditor/outputs.py). The checks here compare the
bytes of every input before and after, list every file of the folder (hidden
temporary files included) and read the exit codes the README's guarantees state.
"""

from __future__ import annotations

import errno
import hashlib
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import polars as pl
import pytest
from conftest import ROOT, run_cli

from auditor.cli import main
from auditor.errors import AuditError
from auditor.io.outputs import Interrupted, OutputSet, input_files, on_signal, signals_held

EXAMPLES = ROOT / "examples"
KEYS = ("--unit", "orchard_id", "--time", "season")


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _listing(folder: Path) -> list[str]:
    """Every entry of ``folder``, hidden ones included."""
    return sorted(p.name for p in folder.iterdir())


@pytest.fixture
def waves(tmp_path) -> Path:
    """A folder of two small wave files of the orchard registry."""
    folder = tmp_path / "waves"
    folder.mkdir()
    frame = pl.read_csv(EXAMPLES / "orchards.csv").filter(pl.col("orchard_id") <= "OR-0040")
    frame.filter(pl.col("season") <= 2020).write_csv(folder / "a.csv")
    frame.filter(pl.col("season") > 2020).write_csv(folder / "b.csv")
    return folder


def _refused(argv: list[str], capsys, code: str) -> str:
    assert main(argv) == 2
    err = capsys.readouterr().err
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("panel-audit: error: "), err
    return lines[0]


# --- item 1: an output that is any input of the run ----------------------------------


@pytest.mark.parametrize("form", ["folder", "glob", "list"])
def test_draft_refuses_an_out_inside_its_expanded_data(waves, capsys, form):
    target = waves / "b.csv"
    before = _digest(target)
    data = {"folder": [str(waves)], "glob": [str(waves / "*.csv")], "list": [str(waves / "a.csv"), str(target)]}[form]
    line = _refused(["rules", "draft", *data, *KEYS, "--out", str(target), "--force"], capsys, "output-is-input")
    assert "is an input of this run" in line
    assert _digest(target) == before
    assert _listing(waves) == ["a.csv", "b.csv"]


def test_report_refuses_to_replace_its_rules_file(tmp_path, capsys):
    rules = tmp_path / "limits.yaml"
    rules.write_text("profile:\n  high_missing_share: 0.3\n")
    before = _digest(rules)
    _refused(["report", str(EXAMPLES / "orchards.csv"), *KEYS, "--rules", str(rules), "--out", str(rules),
              "--force"], capsys, "output-is-input")
    assert _digest(rules) == before


def test_report_refuses_a_figure_that_is_its_rules_file(tmp_path, capsys):
    # the rules file is named like a figure in --png-dir: writing the figures would replace it
    figs = tmp_path / "figs"
    figs.mkdir()
    rules = figs / "participation.png"
    rules.write_text("profile:\n  high_missing_share: 0.3\n")
    before = _digest(rules)
    _refused(["report", str(EXAMPLES / "orchards.csv"), *KEYS, "--rules", str(rules), "--out",
              str(tmp_path / "r.html"), "--png-dir", str(figs), "--force"], capsys, "output-is-input")
    assert _digest(rules) == before
    assert not (tmp_path / "r.html").exists()


def test_report_refuses_the_base_found_through_a_folder(waves, capsys, tmp_path):
    new = tmp_path / "new.csv"
    pl.read_csv(EXAMPLES / "orchards_next_season.csv").write_csv(new)
    before = _digest(waves / "a.csv")
    _refused(["report", str(new), "--against", str(waves), *KEYS, "--out", str(waves / "a.csv"), "--force"],
             capsys, "output-is-input")
    assert _digest(waves / "a.csv") == before


def test_export_refuses_its_own_contract(tmp_path, capsys):
    contract = tmp_path / "c.yaml"
    contract.write_text("columns:\n  x: {min: 0}\n")
    _refused(["rules", "export", str(contract), "--out", str(contract), "--force"], capsys, "output-is-input")
    assert contract.read_text() == "columns:\n  x: {min: 0}\n"


def test_a_hard_link_to_an_input_is_the_input(waves, capsys):
    alias = waves.parent / "alias.yaml"
    os.link(waves / "a.csv", alias)
    before = _digest(waves / "a.csv")
    _refused(["rules", "draft", str(waves), *KEYS, "--out", str(alias), "--force"], capsys, "output-is-input")
    assert _digest(waves / "a.csv") == before


def test_input_files_expand_like_the_loader(waves):
    # the oracle is the folder listing itself: every data file, nothing else
    (waves / "notes.txt").write_text("not a wave")
    found = input_files(str(waves), None, files=["rules.yaml", None])
    assert [p.name for p in found] == ["a.csv", "b.csv", "rules.yaml"]


# --- item 5: two runs racing for one new --out -----------------------------------------


def test_a_target_that_appears_before_publication_is_not_replaced(tmp_path):
    out = tmp_path / "contract.yaml"
    outs = OutputSet(force=False)
    outs.claim(out)
    outs.stage(out, "ours\n")
    out.write_text("the other run's\n")  # another run published first
    with pytest.raises(AuditError) as err:
        outs.publish()
    outs.discard()
    assert err.value.code == "output-exists"
    assert out.read_text() == "the other run's\n"
    assert _listing(tmp_path) == ["contract.yaml"]


def test_a_failed_publication_undoes_the_files_already_published(tmp_path):
    # the second target appears meanwhile: the first, already in place, is taken back
    a, b = tmp_path / "a.html", tmp_path / "b.png"
    outs = OutputSet(force=False)
    outs.stage(a, "page")
    outs.stage(b, "figure")
    b.write_text("someone else's")
    with pytest.raises(AuditError) as err:
        outs.publish()
    assert err.value.code == "output-exists"
    assert _listing(tmp_path) == ["b.png"] and b.read_text() == "someone else's"


def test_concurrent_runs_for_one_new_out_exactly_one_wins(tmp_path):
    out = tmp_path / "contract.yaml"
    env = dict(os.environ, PYTHONPATH=str(ROOT), NO_COLOR="1")
    argv = [sys.executable, "-m", "auditor.cli", "rules", "draft", str(EXAMPLES / "orchards.csv"), *KEYS,
            "--out", str(out)]
    procs = [subprocess.Popen(argv, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for _ in range(3)]
    results = [(p.wait(timeout=300), p.stderr.read()) for p in procs]
    for p in procs:
        p.stdout.close()
        p.stderr.close()
    assert sorted(rc for rc, _ in results) == [0, 2, 2], results
    assert all("already exists" in err for rc, err in results if rc == 2)
    assert out.read_text().startswith("# Panel contract drafted by panel-audit")
    assert _listing(tmp_path) == ["contract.yaml"]


# --- item 6: links, one path twice, full disks ------------------------------------------


def test_a_dangling_link_at_out_is_refused_without_force(tmp_path, capsys):
    link = tmp_path / "report.html"
    link.symlink_to(tmp_path / "nowhere.html")
    line = _refused(["report", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(link)], capsys, "output-is-link")
    assert "symbolic link" in line
    assert link.is_symlink() and not (tmp_path / "nowhere.html").exists()


def test_a_link_at_out_is_refused_with_force(tmp_path, capsys):
    real = tmp_path / "elsewhere.yaml"
    real.write_text("kept\n")
    link = tmp_path / "contract.yaml"
    link.symlink_to(real)
    _refused(["rules", "draft", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(link), "--force"],
             capsys, "output-is-link")
    assert link.is_symlink() and real.read_text() == "kept\n"


def test_a_link_that_appears_before_publication_is_not_followed(tmp_path):
    out, real = tmp_path / "r.html", tmp_path / "elsewhere"
    real.write_text("kept")
    outs = OutputSet(force=True)
    outs.stage(out, "page")
    out.symlink_to(real)  # planted while the run worked
    with pytest.raises(AuditError) as err:
        outs.publish()
    assert err.value.code == "output-is-link"
    assert out.is_symlink() and real.read_text() == "kept"
    assert _listing(tmp_path) == ["elsewhere", "r.html"]


def test_out_inside_png_dir_with_a_figures_name_is_refused(tmp_path, capsys):
    figs = tmp_path / "figs"
    line = _refused(["report", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(figs / "participation.png"),
                     "--png-dir", str(figs), "--force"], capsys, "output-twice")
    assert "written twice" in line and "--png-dir" in line
    assert not figs.exists() or _listing(figs) == []


def _full_disk_after(monkeypatch, good_writes: int) -> None:
    """The file system fills up after ``good_writes`` staged files: the next fsync fails."""
    import auditor.io.outputs as outputs

    calls = {"n": 0}
    real = outputs.os.fsync

    def fsync(fd):
        calls["n"] += 1
        if calls["n"] > good_writes:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(fd)

    monkeypatch.setattr(outputs.os, "fsync", fsync)


def test_png_dir_on_a_full_disk_leaves_no_page_and_no_figure(tmp_path, monkeypatch, capsys):
    _full_disk_after(monkeypatch, good_writes=2)  # the page and one figure fit, the next does not
    out, figs = tmp_path / "r.html", tmp_path / "figs"
    line = _refused(["report", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(out), "--png-dir", str(figs)],
                    capsys, "output-unwritable")
    assert "No space left on device" in line
    assert _listing(tmp_path) == ["figs"] and _listing(figs) == []


def test_png_dir_on_a_full_disk_with_force_keeps_the_old_report(tmp_path, monkeypatch, capsys):
    out, figs = tmp_path / "r.html", tmp_path / "figs"
    figs.mkdir()
    out.write_text("the earlier report")
    (figs / "participation.png").write_bytes(b"earlier figure")
    _full_disk_after(monkeypatch, good_writes=3)
    _refused(["report", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(out), "--png-dir", str(figs),
              "--force"], capsys, "output-unwritable")
    assert out.read_text() == "the earlier report"
    assert _listing(tmp_path) == ["figs", "r.html"]
    assert _listing(figs) == ["participation.png"]
    assert (figs / "participation.png").read_bytes() == b"earlier figure"


def test_a_publication_undone_puts_the_old_files_back(tmp_path):
    # published with force, then the run fails (standard output, a later step): undone
    a, b = tmp_path / "a.txt", tmp_path / "b.txt"
    a.write_text("old a")
    outs = OutputSet(force=True)
    outs.stage(a, "new a")
    outs.stage(b, "new b")
    assert outs.publish() == [a, b]
    assert a.read_text() == "new a" and b.read_text() == "new b"
    outs.discard()
    assert a.read_text() == "old a" and not b.exists()
    assert _listing(tmp_path) == ["a.txt"]


def test_a_publication_kept_drops_the_old_copies(tmp_path):
    a = tmp_path / "a.txt"
    a.write_text("old a")
    with OutputSet(force=True) as outs:
        outs.stage(a, "new a")
        outs.publish()
    assert a.read_text() == "new a"
    assert _listing(tmp_path) == ["a.txt"]


needs_dev_full = pytest.mark.skipif(not Path("/dev/full").exists(), reason="no /dev/full on this system")


@needs_dev_full
def test_export_to_a_full_standard_output_keeps_no_suite(tmp_path):
    contract = tmp_path / "c.yaml"
    contract.write_text("columns:\n  x: {min: 0}\n")
    out = tmp_path / "suite.json"
    with open("/dev/full", "w") as full:
        proc = subprocess.run([sys.executable, "-m", "auditor.cli", "rules", "export", str(contract), "--out",
                               str(out)], stdout=full, stderr=subprocess.PIPE, text=True, cwd=ROOT,
                              env=dict(os.environ, PYTHONPATH=str(ROOT)), timeout=300)
    assert proc.returncode == 2
    assert proc.stderr.strip() == "panel-audit: error: cannot write to standard output: No space left on device; nothing was kept"
    assert _listing(tmp_path) == ["c.yaml"]


@needs_dev_full
@pytest.mark.parametrize("extra", [[], ["--json"]])
def test_profile_to_a_full_standard_output_is_exit_2_with_one_line(extra):
    with open("/dev/full", "w") as full:
        proc = subprocess.run([sys.executable, "-m", "auditor.cli", "profile", str(EXAMPLES / "orchards.csv"), *KEYS,
                               *extra], stdout=full, stderr=subprocess.PIPE, text=True, cwd=ROOT,
                              env=dict(os.environ, PYTHONPATH=str(ROOT)), timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.splitlines() == [
        "panel-audit: error: cannot write to standard output: No space left on device; nothing was kept"
    ]


class _FullStream:
    """A standard output on a full disk (any system): every flush fails with ENOSPC."""

    def __init__(self):
        self.written = []

    def write(self, text):
        self.written.append(text)
        return len(text)

    def flush(self):
        raise OSError(errno.ENOSPC, "No space left on device")

    def fileno(self):
        raise OSError(errno.EBADF, "no descriptor")

    def isatty(self):
        return False


def test_draft_to_a_full_standard_output_keeps_no_contract(tmp_path, monkeypatch, capsys):
    out = tmp_path / "c.yaml"
    monkeypatch.setattr(sys, "stdout", _FullStream())
    assert main(["rules", "draft", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(out)]) == 2
    assert capsys.readouterr().err == (
        "panel-audit: error: cannot write to standard output: No space left on device; nothing was kept\n"
    )
    assert _listing(tmp_path) == []


def test_a_closed_pipe_is_not_an_error(tmp_path):
    proc = subprocess.Popen([sys.executable, "-m", "auditor.cli", "profile", str(EXAMPLES / "orchards.csv"), *KEYS,
                             "--json", "--fail-on", "never"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=ROOT,
                            env=dict(os.environ, PYTHONPATH=str(ROOT)))
    proc.stdout.read(10)
    proc.stdout.close()  # the reader stops early, as `| head` does
    assert proc.wait(timeout=120) == 0
    assert proc.stderr.read() == b""
    proc.stderr.close()


# --- item 4: SIGTERM and SIGINT while a file is being written ----------------------------

_SLOW_WRITE = """
import sys, time, pathlib
import auditor.io.outputs as outputs
marker = pathlib.Path(sys.argv[1])
real = outputs.os.fsync
def fsync(fd):
    real(fd)
    marker.write_text("staged")
    time.sleep(60)  # the run is stopped here, its temporary file on disk
outputs.os.fsync = fsync
sys.argv = ["panel-audit", *sys.argv[2:]]
from auditor.cli import main
main()
"""


@pytest.mark.parametrize("sig, code, name", [(signal.SIGTERM, 143, "SIGTERM"), (signal.SIGINT, 130, None),
                                             (signal.SIGHUP, 129, "SIGHUP")])
@pytest.mark.parametrize("force", [False, True])
def test_a_signal_during_a_write_leaves_no_part_file(tmp_path, sig, code, name, force):
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    out = out_dir / "contract.yaml"
    if force:
        out.write_text("the earlier contract\n")
    marker = tmp_path / "staged"
    argv = ["rules", "draft", str(EXAMPLES / "orchards.csv"), *KEYS, "--out", str(out), *(["--force"] if force else [])]
    proc = subprocess.Popen([sys.executable, "-c", _SLOW_WRITE, str(marker), *argv], cwd=ROOT,
                            env=dict(os.environ, PYTHONPATH=str(ROOT)), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 240
    while not marker.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the write never started"
        time.sleep(0.05)
    assert any(p.name.endswith(".part") for p in out_dir.iterdir())  # caught mid-write
    proc.send_signal(sig)
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == code, stderr
    assert stderr == f"panel-audit: interrupted{f' ({name})' if name else ''}\n"
    assert stdout == ""
    assert _listing(out_dir) == (["contract.yaml"] if force else [])
    if force:
        assert out.read_text() == "the earlier contract\n"


def test_signals_are_held_while_files_are_published():
    # the command's handler defers the interrupt to the end of the block, whichever
    # thread of this (multi-threaded) process the signal reached
    seen = []
    previous = signal.signal(signal.SIGTERM, on_signal)
    try:
        with pytest.raises(Interrupted) as stop:
            with signals_held():
                os.kill(os.getpid(), signal.SIGTERM)
                time.sleep(0.2)
                seen.append("inside, not interrupted")
        assert stop.value.signum == signal.SIGTERM
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert seen == ["inside, not interrupted"]


# --- item 16: exit codes -------------------------------------------------------------------


def test_debug_keeps_exit_2_and_prints_the_traceback_before_the_line():
    proc = run_cli("profile", "no-such-file.csv", *KEYS, "--debug")
    assert proc.returncode == 2
    lines = proc.stderr.splitlines()
    assert lines[0] == "Traceback (most recent call last):"
    assert lines[-1] == "panel-audit: error: cannot read 'no-such-file.csv': no such file; check the path"


def test_no_command_is_exit_2_with_one_error_line(capsys):
    assert main([]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    assert captured.err.splitlines() == [
        "panel-audit: error: no command given; choose one of: profile, instruments, compare, check, rules, report, "
        "demo, explain, schema (see 'panel-audit --help')"
    ]
