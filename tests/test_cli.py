"""The msmkit command line: the whole job end to end, and clean failures on bad input."""
import errno
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import msmkit as mk
from msmkit import demo
from msmkit.cli import main


@pytest.fixture(scope="module")
def demo_files(tmp_path_factory):
    """A slice of the demo scenario written as one .npy file per run."""
    folder = tmp_path_factory.mktemp("runs")
    trajs = demo.trajectories(seed=1, n_runs=8, max_frames=3000)
    for i, run in enumerate(trajs):
        np.save(folder / f"run{i:02d}.npy", np.asarray(run))
    return folder


@pytest.fixture(scope="module")
def demo_output(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    assert main(["demo", "-o", str(out), "-q", "--samples", "20"]) == 0
    return out


def test_demo_writes_every_output(demo_output):
    names = {p.name for p in demo_output.iterdir()}
    assert {"model.npz", "implied_timescales.png", "implied_timescales.csv", "populations.csv", "summary.txt",
            "chapman_kolmogorov.png", "chapman_kolmogorov.csv", "lag_flow.png", "macrostates.csv",
            "mfpt_macrostates.csv"} <= names
    assert not [n for n in names if n.endswith(".tmp")]
    model = mk.load_model(demo_output / "model.npz")
    assert model.unit == demo.UNIT and model.dt == demo.DT
    assert model.extras["affinity"].shape == (model.n_states, 3)
    summary = (demo_output / "summary.txt").read_text()
    assert "Chapman–Kolmogorov test" in summary and "macrostates (PCCA+): 3" in summary
    assert "computed at lag resolution" in summary  # the passage times say how coarse they are
    # macrostate kinetics with intervals and units: the estimates are the model's own passage
    # times between the crisp macrostates (Kemeny & Snell first passage, msmkit.kinetics)
    assert "(95% interval" in summary and f"rate constant [1/{demo.UNIT}], 95% intervals" in summary
    kinetics = pd.read_csv(demo_output / "macrostate_kinetics.csv")
    crisp = model.extras["affinity"].argmax(axis=1)
    members = [model.states[crisp == j] for j in range(3)]
    expected = model.passage_time_matrix(members)
    for row in kinetics.itertuples():
        unit = demo.UNIT
        assert getattr(row, f"passage_time_{unit}") == pytest.approx(expected[row.from_set, row.to_set], rel=1e-9)
        assert getattr(row, f"passage_time_{unit}_lower") < getattr(row, f"passage_time_{unit}_upper")
    pops = pd.read_csv(demo_output / "macrostates.csv")
    assert (pops.population_lower < pops.population_upper).all()


def test_demo_recovers_the_slow_process_of_the_three_basins(demo_output):
    # The demo's slowest relaxation time from a grid discretisation of its Smoluchowski operator
    # (demo.reference_timescales, an independent computation); the simulated dynamics relax a few
    # per cent slower (finite integrator step, see msmkit.demo), so 25 % is allowed. The timescale
    # must also be stable across lags: the value at every larger scanned lag inside the chosen
    # lag's bootstrap interval (Prinz et al. 2011, implied-timescale test).
    model = mk.load_model(demo_output / "model.npz")
    reference = demo.reference_timescales(1)[0]
    slowest = model.relaxation_times(1)[0]
    assert abs(slowest - reference) / reference < 0.25, (slowest, reference)
    table = pd.read_csv(demo_output / "implied_timescales.csv")
    first = table[table.process == 1].set_index("lag")
    chosen = first.loc[model.lag]
    later = first[first.index > model.lag]
    assert len(later) >= 1
    assert np.all((later.timescale >= chosen.lower) & (later.timescale <= chosen.upper))


def test_build_prints_macrostate_kinetics_with_posterior_intervals(demo_files, tmp_path, capsys):
    target = tmp_path / "model.npz"
    assert main(["build", str(demo_files / "*.npy"), "--lag", "2", "--states", "12", "--tica-dim", "2",
                 "--dt", "0.1", "--unit", "ns", "--uncertainty", "bayes", "--samples", "200", "-o", str(target)]) == 0
    out = capsys.readouterr().out
    model = mk.load_model(target)
    n_sets = model.extras["affinity"].shape[1]
    assert f"macrostates (PCCA+): {n_sets}" in out and "(95% interval" in out
    assert "posterior of reversible transition matrices" in out and "divided by the lag" in out
    pairs = re.findall(r"^    (\d) -> (\d): passage time [\d.e+-]+ \[[\d.e+-]+, [\d.e+-]+\] ns, rate [\d.e+-]+ "
                       r"\[[\d.e+-]+, [\d.e+-]+\] per ns$", out, flags=re.M)
    assert len(pairs) == n_sets * (n_sets - 1), out
    with pytest.raises(SystemExit):
        main(["build", str(demo_files / "*.npy"), "--lag", "2", "--uncertainty", "jackknife", "-o", str(target)])


def test_build_scan_and_info_on_files(demo_files, tmp_path, capsys):
    files = sorted(str(p) for p in demo_files.glob("*.npy"))
    target = tmp_path / "model.npz"
    code = main(["build", *files, "--lag", "5", "--states", "20", "--tica-dim", "2", "--dt", "0.1", "--unit", "ns",
                 "--samples", "0", "-o", str(target), "-q"])
    assert code == 0
    model = mk.load_model(target)
    assert (model.lag, model.dt, model.unit) == (5, 0.1, "ns")
    assert model.extras["centers"].shape == (20, 2)
    assert model.extras["tica_components"].shape == (2, len(demo.FEATURE_NAMES))

    scan_dir = tmp_path / "scan"
    assert main(["scan", str(demo_files / "*.npy"), "--lags", "1,2,5,10", "--states", "20", "--samples", "5",
                 "--dt", "0.1", "--unit", "ns", "-o", str(scan_dir), "-q"]) == 0
    table = pd.read_csv(scan_dir / "implied_timescales.csv")
    assert sorted(table.lag.unique()) == [1, 2, 5, 10]
    assert (scan_dir / "implied_timescales.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"

    capsys.readouterr()
    assert main(["info", str(target)]) == 0
    out = capsys.readouterr().out
    assert "states kept:       20" in out or "states kept:" in out
    assert "lag:               5 frames = 0.5 ns" in out


@pytest.mark.parametrize("args, message", [
    (["build", "{missing}", "--lag", "2", "-o", "{out}"], "no such file"),
    (["build", "{runs}/*.npy", "--lag", "100000", "--states", "5", "-o", "{out}"], "lag"),
    (["build", "{runs}/*.npy", "--lag", "2", "--states", "100000", "-o", "{out}"], "cluster"),
    (["build", "{bad}", "--lag", "2", "-o", "{out}"], "file type"),
    (["scan", "{runs}/*.npy", "--lags", "1,x", "-o", "{out}"], "--lags"),
])
def test_bad_input_is_one_line_exit_1_and_writes_nothing(args, message, demo_files, tmp_path, capsys):
    bad = tmp_path / "notes.docx"
    bad.write_text("not a trajectory")
    out = tmp_path / "result"
    filled = [a.format(missing=tmp_path / "nope.npy", runs=demo_files, out=out, bad=bad) for a in args]
    assert main(filled + ["-q"]) == 1
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "error:" in err and "Traceback" not in err
    assert message.lower() in err.lower()
    assert not out.exists() and not (tmp_path / "result.npz").exists()


def test_existing_model_file_is_not_overwritten_without_force(demo_files, tmp_path, capsys):
    target = tmp_path / "model.npz"
    target.write_bytes(b"precious")
    code = main(["build", str(demo_files / "*.npy"), "--lag", "2", "--states", "5", "-o", str(target), "-q"])
    assert code == 1 and "--force" in capsys.readouterr().err
    assert target.read_bytes() == b"precious"


def test_malformed_command_line_exits_2(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["build", "x.npy", "--lag", "-3", "-o", "m.npz"])
    assert exc.value.code == 2


def test_installed_command_help_and_error_without_traceback(tmp_path):
    # the console-script entry point, as a user runs it
    exe = [sys.executable, "-m", "msmkit.cli"]
    for sub in ("demo", "build", "scan", "info"):
        done = subprocess.run(exe + [sub, "--help"], capture_output=True, text=True)
        assert done.returncode == 0 and "usage:" in done.stdout
    done = subprocess.run(exe + ["info", str(tmp_path / "none.npz")], capture_output=True, text=True)
    assert done.returncode == 1
    assert "Traceback" not in done.stderr and done.stderr.strip().startswith("msmkit info: error:")


def test_help_states_the_defaults_each_command_uses(capsys):
    # argparse prints %(default)s from the parser itself (Python docs, argparse), so the help text
    # cannot drift from what the command does: the demo clusters into 60 states, build into 100.
    with pytest.raises(SystemExit):
        main(["demo", "--help"])
    demo_help = " ".join(capsys.readouterr().out.split())
    assert "microstates (default 60)" in demo_help and "(default 100)" not in demo_help
    with pytest.raises(SystemExit):
        main(["build", "--help"])
    assert "microstates (default 100)" in " ".join(capsys.readouterr().out.split())


def test_uncertainty_option_help_and_choices(capsys, tmp_path):
    # one definition (cli.add_uncertainty_option) for scan and demo; argparse prints %(default)s
    for command in ("scan", "demo"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        text = " ".join(capsys.readouterr().out.split())
        assert "--uncertainty {bootstrap,bayes}" in text and "(default bootstrap)" in text
    with pytest.raises(SystemExit) as exc:
        main(["scan", "x.npy", "--uncertainty", "jackknife", "-o", str(tmp_path / "o")])
    assert exc.value.code == 2 and "--uncertainty" in capsys.readouterr().err


def test_scan_with_bayes_intervals(demo_files, tmp_path):
    # the same labels and models as the bootstrap scan (same seed and states): the timescales
    # agree exactly and only the intervals differ
    common = [str(demo_files / "*.npy"), "--lags", "1,2,5", "--states", "20", "--samples", "50", "-q"]
    assert main(["scan", *common, "-o", str(tmp_path / "boot")]) == 0
    assert main(["scan", *common, "--uncertainty", "bayes", "-o", str(tmp_path / "bayes")]) == 0
    boot = pd.read_csv(tmp_path / "boot" / "implied_timescales.csv")
    bayes = pd.read_csv(tmp_path / "bayes" / "implied_timescales.csv")
    np.testing.assert_allclose(bayes.timescale, boot.timescale, rtol=1e-12)
    assert not np.allclose(bayes.lower, boot.lower)
    assert np.all(bayes.lower <= bayes.upper)
    summary = (tmp_path / "bayes" / "summary.txt").read_text()
    assert "intervals:         95% from 50 samples per lag, bayes" in summary
    assert "credible intervals from 50 samples of the posterior" in summary


def test_options_a_command_does_not_use_are_refused(capsys, tmp_path):
    # scan runs no Chapman–Kolmogorov test, so --multiples is a usage error (exit 2), not ignored
    with pytest.raises(SystemExit) as exc:
        main(["scan", "x.npy", "--multiples", "3", "-o", str(tmp_path / "o")])
    assert exc.value.code == 2
    assert "--multiples" in capsys.readouterr().err


# --------------------------------------------------------------------------- faults: one line, exit 1

def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "error:" in err and "Traceback" not in err, err
    return err


BUILD = ["build", "{runs}/*.npy", "--lag", "2", "--states", "5", "-q", "-o", "{out}"]


def _build_args(demo_files, out):
    return [a.format(runs=demo_files, out=out) for a in BUILD]


@pytest.mark.parametrize("code, word", [(errno.ENOSPC, "no space left"), (errno.EROFS, "cannot write there"),
                                        (errno.EACCES, "cannot write there")])
def test_write_failures_are_one_line(demo_files, tmp_path, capsys, monkeypatch, code, word):
    """A full disk (the failing fsync) or a read-only / forbidden folder: one line, exit 1, and no file or
    temporary left (running as root, a chmod would not stop the write, so the OS error is injected)."""
    import msmkit.modelfile as mf

    def failing(*args, **kwargs):
        raise OSError(code, os.strerror(code))

    monkeypatch.setattr(mf.os, "fsync", failing)
    assert main(_build_args(demo_files, tmp_path / "m.npz")) == 1
    err = _one_error_line(capsys)
    assert word in err and str(tmp_path / "m.npz") in err
    assert os.listdir(tmp_path) == []


def test_folder_that_cannot_hold_a_temporary_is_one_line(demo_files, tmp_path, capsys, monkeypatch):
    import msmkit.modelfile as mf

    def refused(*args, dir=None, **kwargs):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), dir)

    monkeypatch.setattr(mf.tempfile, "mkstemp", refused)
    assert main(_build_args(demo_files, tmp_path / "m.npz")) == 1
    assert "cannot write there" in _one_error_line(capsys)


def _zip_method_99(good: Path, dst: Path) -> Path:
    raw = bytearray(good.read_bytes())
    for sig, off in ((b"PK\x03\x04", 8), (b"PK\x01\x02", 10)):
        pos = raw.find(sig)
        raw[pos + off: pos + off + 2] = (99).to_bytes(2, "little")
    dst.write_bytes(bytes(raw))
    return dst


MALFORMED = {
    "random bytes": lambda good, dst: dst.write_bytes(os.urandom(300)) and dst,
    "truncated": lambda good, dst: dst.write_bytes(good.read_bytes()[:500]) and dst,
    "empty": lambda good, dst: dst.write_bytes(b"") or dst,
    "text": lambda good, dst: dst.write_text("{\"format\": \"msmkit-model\"}") and dst,
    "unsupported compression": _zip_method_99,
    "folder": lambda good, dst: dst.mkdir() or dst,
}


@pytest.mark.parametrize("case", list(MALFORMED))
def test_info_on_malformed_model_files(case, tmp_path, capsys):
    good = mk.MarkovModel.from_transition_matrix([[0.9, 0.1], [0.2, 0.8]]).save(tmp_path / "good.npz")
    bad = MALFORMED[case](good, tmp_path / "bad.npz")
    assert main(["info", str(bad)]) == 1
    assert "bad.npz" in _one_error_line(capsys)


def test_unforeseen_failure_is_still_one_line(demo_files, tmp_path, capsys, monkeypatch):
    import msmkit.model as mm

    def broken(*args, **kwargs):
        raise RuntimeError("something\nunexpected")

    monkeypatch.setattr(mm, "build_model", broken)
    assert main(_build_args(demo_files, tmp_path / "m.npz")) == 1
    err = _one_error_line(capsys)
    assert "unexpected RuntimeError: something unexpected" in err and "MSMKIT_TRACEBACK" in err


def test_build_without_suffix_does_not_overwrite(demo_files, tmp_path, capsys):
    """``-o model`` writes model.npz, so the existence check must look at model.npz."""
    (tmp_path / "model.npz").write_bytes(b"precious")
    assert main(_build_args(demo_files, tmp_path / "model")) == 1
    assert "--force" in _one_error_line(capsys)
    assert (tmp_path / "model.npz").read_bytes() == b"precious"
    assert main(_build_args(demo_files, tmp_path / "model") + ["--force"]) == 0
    assert mk.load_model(tmp_path / "model.npz").lag == 2


def test_scan_into_a_folder_with_outputs_needs_force(demo_files, tmp_path, capsys):
    out = tmp_path / "scan"
    out.mkdir()
    (out / "summary.txt").write_text("earlier results")
    args = ["scan", str(demo_files / "*.npy"), "--lags", "1,2", "--states", "5", "--samples", "0", "-q", "-o", str(out)]
    assert main(args) == 1
    err = _one_error_line(capsys)
    assert "summary.txt" in err and "--force" in err
    assert (out / "summary.txt").read_text() == "earlier results" and os.listdir(out) == ["summary.txt"]
    assert main(args + ["--force"]) == 0
    assert (out / "summary.txt").read_text().startswith("msmkit model summary")
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.md").write_text("unrelated")  # a folder without our outputs is fine
    assert main(args[:-1] + [str(other)]) == 0


def _saved(T, path):
    import warnings

    from msmkit.errors import DiagnosticWarning
    from msmkit.model import MarkovModel
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return MarkovModel.from_transition_matrix(np.asarray(T, dtype=float)).save(path)


@pytest.mark.parametrize("T, expected", [
    ([[1.0]], "implied timescales: none (a single state"),
    # a 3-cycle: eigenvalues 1, exp(+-2 pi i / 3) (exact: the cube roots of unity); PCCA+ cannot
    # split the complex pair into 2 sets, which info reports instead of failing
    ([[0, 1, 0], [0, 0, 1], [1, 0, 0]], "macrostates (PCCA+): none -- not computed: n_sets=2"),
])
def test_info_of_a_sound_model_that_has_no_timescales_or_macrostates_exits_0(T, expected, tmp_path, capsys):
    path = _saved(T, tmp_path / "m.npz")
    assert main(["info", str(path)]) == 0
    captured = capsys.readouterr()
    assert expected in captured.out and captured.err == ""


def test_exit_codes_of_help_version_and_usage(capsys):
    """argparse conventions: --help and --version exit 0, a malformed command line 2."""
    for argv, code in ((["--help"], 0), (["--version"], 0), (["build", "--help"], 0), (["info", "-h"], 0),
                       ([], 2), (["bogus"], 2), (["info"], 2), (["build", "x.npy", "-o", "m"], 2)):
        with pytest.raises(SystemExit) as exc:
            main(argv)
        assert exc.value.code == code, argv
    out = capsys.readouterr()
    assert "msmkit " in out.out and "usage:" in out.err


@pytest.mark.parametrize("name, content, words", [
    ("bad.npy", b"\x93NUMPY\x01\x00\x10\x00{'descr': 'zz'\n", "the header cannot be parsed"),
    ("bad.csv", b"a,b\n1,2\n3\n", "line 3 has 1 value"),
    ("bad.npz", b"PK\x05\x06" + b"\x00" * 18, "holds no runs"),
    ("bad.tsv", b"1\t2\n\xff\xfe\t3\n", "line 2 is not UTF-8"),
])
def test_build_on_a_malformed_file_names_it_and_writes_nothing(name, content, words, demo_files, tmp_path, capsys):
    bad = tmp_path / name
    bad.write_bytes(content)
    out = tmp_path / "m.npz"
    assert main(["build", str(demo_files / "run00.npy"), str(bad), "--lag", "1", "--states", "3", "-o", str(out),
                 "-q"]) == 1
    err = _one_error_line(capsys)
    assert name in err and words in err and "unexpected" not in err
    assert not out.exists()
