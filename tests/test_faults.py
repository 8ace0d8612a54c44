"""Faults and bad inputs, tried as a careful user would: every case names its expected outcome.

For each case the suite checks the outcome (exit code and a fragment of the one-line message, or the flag in
the results), that every input file has the same SHA-256 before and after, and that nothing is left behind
that passes for a finished output. The interruption cases (kill -9, Ctrl-C, a full disk under the workers,
two writers at once) are in tests/test_pipeline_run.py and tests/test_pipeline_store.py.

Cases by outcome (46 test items here; the API's own refusals of bad values are in the tests of each module)
--------------------------------
refused before anything is written, exit 1, one line naming the output and the input (18):
    run: output.folder "." with electrical_spikes = "spikes.csv" in it; a traces CSV named spikes.csv in the
    output folder; --overwrite with traces = "results.h5" in the output folder; the spike table a hard link to
    the electrical spikes; the output folder a symbolic link to the inputs' folder; an input inside the work
    folder; the configuration file itself named spikes.csv in the output folder; a calibration file
    (calibration.file) named spikes.csv there;
    dff --out a hard link / a symbolic link to the input (with --overwrite); filter --plot a link to the
    input; predict --out the spike file; infer whose spike table (beside --out) is the input CSV;
    fit-kernel and score --out folders holding an input under an output name; report with the results file
    inside the report's figures folder; export-nwb --out a hard link to the results; extract --out the masks.
    (+1 unit test of the check itself: roles, hard links, folders, symbolic links inside an output folder.)
usage error, exit 2, naming the flag, nothing read or written (12):
    --frame-rate nan / inf / -30 / 0 (dff), nan (noise, predict, fit-kernel), -inf (infer); --duration-s nan
    (simulate); --window-s inf (dff); --frame-rates nan (plan); --percentile nan (dff).
refused at once, exit 1, one line naming the address, no output folder (2):
    execution.scheduler = "tcp://127.0.0.1:1", and a port nothing listens on.
"no space left" naming the file, exit 1, no partial file, no page or work folder that looks finished (7):
    atomic_output under ENOSPC and under numpy's cut-short write (2); the report's second figure on a full
    disk (an earlier report's page removed, the results complete); on a real 16 kB disk: dff to .h5, .npy and
    .csv, and run (4, one test).
not called a full disk (1): a write cut short on a disk with room keeps its own message.
flagged, the run completes, exit 0 (1): an all-zero ROI and a dim ROI (F0 exactly 0) in calcium run.
one line naming the ROIs, exit 1; with the remedy it names, exit 0 (1): dff of those ROIs.
works, exit 0 (2): a run with worker processes beside a folder named calcium; --overwrite replacing the
    outputs of an earlier run (the control of the refusals).
garbage refused, one line naming the flag to change, nothing written (3): raw fluorescence given to infer
    (--allow-raw); a decay without a spike size (--spike-size); the frame period given as the frame rate.
garbage analysed when the user insists, every ROI flagged (1): infer --allow-raw on raw fluorescence.
"""
import hashlib
import os
from pathlib import Path

import numpy as np
import pytest

from calcium.cli import main
from calcium.forward import simulate_recording
from calcium.io import write_spike_table, write_traces

RATE = 20.0


def _sha(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _files(folder: Path) -> dict:
    """Every file under ``folder`` (links included, not followed) -> its SHA-256 (None for a dangling link)."""
    out = {}
    for root, _, names in os.walk(folder):
        for name in names:
            path = Path(root, name)
            out[path.relative_to(folder)] = _sha(path) if path.exists() else None
    return out


@pytest.fixture(scope="module")
def recording():
    return simulate_recording(3, 20.0, RATE, indicator="GCaMP6f", rate_hz=0.5, noise_sd=0.03, seed=3)


@pytest.fixture
def session(tmp_path, recording, monkeypatch):
    """A folder with raw traces (HDF5 and CSV), ΔF/F traces, electrical spikes; the working folder."""
    write_traces(tmp_path / "traces.h5", recording.raw, frame_rate=RATE)
    write_traces(tmp_path / "traces.csv", recording.raw, frame_rate=RATE)
    write_traces(tmp_path / "dff.csv", recording.dff, frame_rate=RATE)
    write_spike_table(tmp_path / "ephys.csv", {0: recording.spike_times[0]})
    monkeypatch.chdir(tmp_path)
    return tmp_path


def _toml(path: Path, **sections) -> Path:
    lines = []
    for name, keys in sections.items():
        lines.append(f"[{name}]")
        lines += [f"{key} = {value!r}".replace("'", '"') if isinstance(value, str) else
                  f"{key} = {str(value).lower() if isinstance(value, bool) else value}"
                  for key, value in keys.items()]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _run_config(folder: Path, name="run.toml", **inputs) -> Path:
    return _toml(folder / name, inputs=inputs, output={"folder": "."}, report={"enabled": False},
                 execution={"backend": "serial"}, kernel_fit={"n_bootstrap": 0})


# ---------------------------------------------------------------------------
# data that must never be lost: refused before anything is written
# ---------------------------------------------------------------------------
def _run_electrical_spikes_in_output_folder(s):
    os.replace(s / "ephys.csv", s / "spikes.csv")
    return ["run", str(_run_config(s, traces="traces.h5", electrical_spikes="spikes.csv"))], "spikes.csv"


def _run_traces_named_like_the_spike_table(s):
    os.replace(s / "traces.csv", s / "spikes.csv")
    return ["run", str(_run_config(s, traces="spikes.csv", frame_rate=RATE))], "spikes.csv"


def _run_overwrite_with_traces_named_like_the_results(s):
    os.replace(s / "traces.h5", s / "results.h5")
    return ["run", str(_run_config(s, traces="results.h5")), "--overwrite"], "results.h5"


def _run_spike_table_a_hard_link_to_the_electrical_spikes(s):
    (s / "ephys").mkdir()
    os.replace(s / "ephys.csv", s / "ephys" / "cell.csv")
    os.link(s / "ephys" / "cell.csv", s / "spikes.csv")
    return ["run", str(_run_config(s, traces="traces.h5", electrical_spikes="ephys/cell.csv"))], "link"


def _run_output_folder_a_symbolic_link_to_the_inputs(s):
    (s / "out").symlink_to(s, target_is_directory=True)
    os.replace(s / "ephys.csv", s / "spikes.csv")
    config = _toml(s / "run.toml", inputs={"traces": "traces.h5", "electrical_spikes": "spikes.csv"},
                   output={"folder": "out"}, report={"enabled": False}, execution={"backend": "serial"})
    return ["run", str(config)], "spikes.csv"


def _run_input_inside_the_work_folder(s):
    (s / ".calcium-work").mkdir()
    os.replace(s / "traces.h5", s / ".calcium-work" / "traces.h5")
    return ["run", str(_run_config(s, traces=".calcium-work/traces.h5"))], "folder"


def _run_configuration_file_named_like_the_spike_table(s):
    return ["run", str(_run_config(s, name="spikes.csv", traces="traces.h5"))], "configuration file"


def _run_calibration_file_named_like_the_spike_table(s):
    (s / "spikes.csv").write_text("{}\n")  # (refused before it is read)
    config = _toml(s / "run.toml", inputs={"traces": "traces.h5"}, output={"folder": "."},
                   calibration={"source": "file", "file": "spikes.csv"}, report={"enabled": False},
                   execution={"backend": "serial"})
    return ["run", str(config)], "calibration.file"


def _dff_out_a_hard_link_to_the_input(s):
    os.link(s / "traces.h5", s / "out.h5")
    return ["dff", "traces.h5", "--out", "out.h5", "--overwrite"], "link"


def _dff_out_a_symbolic_link_to_the_input(s):
    (s / "out.h5").symlink_to(s / "traces.h5")
    return ["dff", "traces.h5", "--out", "out.h5", "--overwrite"], "--out"


def _filter_plot_a_link_to_the_input(s):
    (s / "response.png").symlink_to(s / "traces.h5")
    return ["filter", "traces.h5", "--kind", "lowpass", "--cutoff-hz", "2", "--out", "f.h5", "--plot",
            "response.png", "--overwrite"], "--plot"


def _predict_out_the_spike_file(s):
    return ["predict", "ephys.csv", "--frame-rate", "20", "--indicator", "GCaMP6f", "--out", "ephys.csv",
            "--overwrite"], "ephys.csv"


def _infer_spike_table_beside_out_is_the_input(s):
    return ["infer", "dff.csv", "--indicator", "GCaMP6f", "--out", "dff.h5", "--workers", "1"], "dff.csv"


def _fit_kernel_folder_holding_the_spikes_as_its_table(s):
    (s / "fit").mkdir()
    os.replace(s / "ephys.csv", s / "fit" / "kernel_fit.csv")
    return ["fit-kernel", "dff.csv", "fit/kernel_fit.csv", "--out", "fit", "--overwrite"], "kernel_fit.csv"


def _score_folder_holding_an_input_as_its_table(s):
    (s / "scores").mkdir()
    os.replace(s / "ephys.csv", s / "scores" / "scores.csv")
    return ["score", "scores/scores.csv", "scores/scores.csv", "--out", "scores", "--overwrite"], "scores.csv"


def _report_results_inside_its_figures_folder(s):
    (s / "report" / "figures").mkdir(parents=True)
    os.replace(s / "traces.h5", s / "report" / "figures" / "results.h5")
    return ["report", "report/figures/results.h5", "--out", "report", "--overwrite"], "figures"


def _export_nwb_out_a_hard_link_to_the_results(s):
    os.link(s / "traces.h5", s / "session.nwb")
    return ["export-nwb", "traces.h5", "--out", "session.nwb", "--overwrite"], "link"


def _extract_out_the_masks(s):
    masks = np.zeros((2, 8, 8), dtype=bool)
    masks[0, 1:3, 1:3] = masks[1, 5:7, 5:7] = True
    np.save(s / "masks.npy", masks)
    np.save(s / "movie.npy", np.ones((10, 8, 8), dtype=np.float32))
    return ["extract", "movie.npy", "masks.npy", "--out", "masks.npy", "--overwrite"], "masks.npy"


PROTECTED = [_run_electrical_spikes_in_output_folder, _run_traces_named_like_the_spike_table,
             _run_overwrite_with_traces_named_like_the_results, _run_spike_table_a_hard_link_to_the_electrical_spikes,
             _run_output_folder_a_symbolic_link_to_the_inputs, _run_input_inside_the_work_folder,
             _run_configuration_file_named_like_the_spike_table, _run_calibration_file_named_like_the_spike_table,
             _dff_out_a_hard_link_to_the_input,
             _dff_out_a_symbolic_link_to_the_input, _filter_plot_a_link_to_the_input, _predict_out_the_spike_file,
             _infer_spike_table_beside_out_is_the_input, _fit_kernel_folder_holding_the_spikes_as_its_table,
             _score_folder_holding_an_input_as_its_table, _report_results_inside_its_figures_folder,
             _export_nwb_out_a_hard_link_to_the_results, _extract_out_the_masks]


@pytest.mark.parametrize("case", PROTECTED, ids=lambda case: case.__name__.strip("_"))
def test_an_output_over_an_input_is_refused_before_anything_is_written(session, case, capsys):
    argv, fragment = case(session)
    before = _files(session)
    assert main([*argv, "--quiet"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "refusing to write" in err[0] and fragment in err[0], err
    assert _files(session) == before  # every input byte for byte, and no output at all


def test_protect_inputs_names_the_role_and_compares_by_identity(tmp_path):
    # Reference: os.stat's (st_dev, st_ino) identify a file whatever its name (POSIX).
    from calcium._checks import OutputOverInputError
    from calcium.io.results import protect_inputs

    data = tmp_path / "a" / "traces.csv"
    data.parent.mkdir()
    data.write_text("1,2\n")
    protect_inputs({"traces": data}, files=[tmp_path / "spikes.csv"], folders=[tmp_path / "work"])  # unrelated
    os.link(data, tmp_path / "spikes.csv")
    with pytest.raises(OutputOverInputError, match=r"a link to the input file .*traces\.csv \(traces\); fix it"):
        protect_inputs({"traces": data}, files=[tmp_path / "spikes.csv"], remedy="fix it")
    with pytest.raises(OutputOverInputError, match="holds"):
        protect_inputs([data], folders=[tmp_path / "a" / ".." / "a"])
    (tmp_path / "work").mkdir()
    os.link(data, tmp_path / "work" / "copy.csv")  # a run that empties its work folder would only unlink it,
    with pytest.raises(OutputOverInputError):      # but the work folder is the run's: refused all the same
        protect_inputs([data], folders=[tmp_path / "work"])
    (tmp_path / "links").mkdir()
    (tmp_path / "links" / "pointer.csv").symlink_to(data)  # replacing a symbolic link leaves its target alone
    protect_inputs([data], folders=[tmp_path / "links"])


# ---------------------------------------------------------------------------
# options out of range: usage errors (exit 2) naming the flag, before any file is read or written
# ---------------------------------------------------------------------------
USAGE = [(["dff", "traces.h5", "--out", "o.h5"], "--frame-rate", value) for value in ("nan", "inf", "-30", "0")]
USAGE += [(["noise", "traces.h5"], "--frame-rate", "nan"),
          (["infer", "dff.csv", "--out", "o.h5"], "--frame-rate", "-inf"),
          (["predict", "ephys.csv", "--indicator", "GCaMP6f", "--out", "p.h5"], "--frame-rate", "nan"),
          (["fit-kernel", "dff.csv", "ephys.csv"], "--frame-rate", "nan"),
          (["simulate", "--out", "sim"], "--duration-s", "nan"),
          (["dff", "traces.h5", "--out", "o.h5"], "--window-s", "inf"),
          (["plan"], "--frame-rates", "nan"),
          (["dff", "traces.h5", "--out", "o.h5"], "--percentile", "nan")]


@pytest.mark.parametrize("argv, flag, value", USAGE, ids=lambda v: v if isinstance(v, str) else None)
def test_a_non_finite_or_non_positive_option_is_a_usage_error(session, argv, flag, value, capsys):
    before = _files(session)
    with pytest.raises(SystemExit) as exc:
        main([*argv, f"{flag}={value}", "--quiet"])
    assert exc.value.code == 2
    assert f"argument {flag}" in capsys.readouterr().err
    assert _files(session) == before


# ---------------------------------------------------------------------------
# the machine: a dask scheduler that is not there, a folder named like the package
# ---------------------------------------------------------------------------
def _closed_port() -> int:
    import socket

    with socket.socket() as probe:  # a port that was free a moment ago: nothing listens there
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.mark.parametrize("port", [1, None], ids=["port 1", "a closed port"])
def test_an_unreachable_dask_scheduler_is_one_line_naming_it_before_any_output(session, port, capsys):
    address = f"tcp://127.0.0.1:{port or _closed_port()}"
    config = _toml(session / "run.toml", inputs={"traces": "traces.h5"}, output={"folder": "out"},
                   execution={"backend": "dask", "scheduler": address})
    before = _files(session)
    assert main(["run", str(config), "--quiet"]) == 1  # (refused at once: no client time-out)
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and address in err[0] and "execution.scheduler" in err[0], err
    assert _files(session) == before and not (session / "out").exists()


def test_worker_processes_import_the_installed_package_beside_a_folder_named_calcium(session):
    # A folder named like the package in the current folder (here: data) must not be imported by the workers.
    import subprocess
    import sys

    (session / "calcium").mkdir()
    (session / "calcium" / "notes.txt").write_text("my data\n")
    config = _toml(session / "run.toml", inputs={"traces": "traces.h5"}, output={"folder": "out"},
                   report={"enabled": False}, execution={"backend": "processes", "workers": 2, "chunk_rois": 1})
    command = Path(sys.executable).with_name("calcium")  # the console script a user types
    done = subprocess.run([str(command), "run", str(config), "--quiet"], cwd=session, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    from calcium.pipeline import open_results

    with open_results(session / "out" / "results.h5") as results:
        assert results.complete and results.n_rois == 3


# ---------------------------------------------------------------------------
# a full disk: one line naming the file and saying "no space left"; nothing that passes for finished
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("failure", ["errno ENOSPC", "a write cut short by numpy"])
def test_a_full_disk_while_writing_names_the_file_and_removes_the_part_written(tmp_path, failure, monkeypatch):
    import errno
    import shutil

    from calcium.io.results import OutputWriteError, atomic_output

    if failure == "errno ENOSPC":
        cause = OSError(errno.ENOSPC, "No space left on device")
    else:  # numpy's fwrite reports only the counts; the disk is then (nearly) full
        cause = OSError("6000 requested and 2032 written")
        usage = shutil.disk_usage(tmp_path)
        monkeypatch.setattr(shutil, "disk_usage", lambda folder: usage._replace(free=512))
    with pytest.raises(OutputWriteError) as info:
        with atomic_output(tmp_path / "dff.npy") as tmp:
            tmp.write_bytes(b"part of it")
            raise cause
    assert str(info.value).startswith(f"cannot write {tmp_path / 'dff.npy'}: no space left on the device")
    assert info.value.errno == errno.ENOSPC and list(tmp_path.iterdir()) == []


def test_a_write_cut_short_on_a_disk_with_room_is_not_called_a_full_disk(tmp_path):
    from calcium.io.results import OutputWriteError, atomic_output

    with pytest.raises(OSError, match="requested and") as info:
        with atomic_output(tmp_path / "dff.npy"):
            raise OSError("6000 requested and 2032 written")
    assert not isinstance(info.value, OutputWriteError)


def test_a_report_stopped_by_a_full_disk_leaves_no_page_and_no_work_folder(session, monkeypatch, capsys):
    # The disk fills up under the report's second figure, on a rerun whose earlier report was complete.
    import contextlib
    import errno

    from calcium.io import results as results_module
    from calcium.pipeline import open_results

    config = _toml(session / "run.toml", inputs={"traces": "traces.h5"}, output={"folder": "out"},
                   report={"enabled": True, "n_examples": 2}, execution={"backend": "serial"})
    assert main(["run", str(config), "--quiet"]) == 0
    assert (session / "out" / "report" / "index.html").exists()
    real, written = results_module.atomic_output, []

    @contextlib.contextmanager
    def disk_fills_up(path, **kwargs):
        with real(path, **kwargs) as tmp:
            yield tmp
            written.append(Path(path).name)
            if len(written) > 1 and Path(path).suffix == ".png":
                raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(results_module, "atomic_output", disk_fills_up)
    before = _sha(session / "traces.h5")
    assert main(["run", str(config), "--overwrite", "--quiet"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no space left" in err[0] and f"{written[-1]}:" in err[0], err
    assert not (session / "out" / "report" / "index.html").exists()  # no page that passes for the new report
    assert not (session / "out" / ".calcium-work").exists()
    assert _sha(session / "traces.h5") == before
    with open_results(session / "out" / "results.h5") as view:  # the results themselves are finished
        assert view.complete


def _unshare_works(folder: Path) -> bool:
    import shutil
    import subprocess

    if shutil.which("unshare") is None:
        return False
    probe = subprocess.run(["unshare", "--user", "--map-root-user", "--mount", "sh", "-c",
                            f"mount -t tmpfs -o size=16k tmpfs '{folder}'"], capture_output=True)
    return probe.returncode == 0


def test_commands_on_a_really_full_disk_give_one_line_and_leave_nothing(session, tmp_path_factory):
    # A real full disk: a 16 kB tmpfs mounted in a user namespace of its own (Linux), as the output folder.
    import subprocess
    import sys

    disk = tmp_path_factory.mktemp("disk")
    if not _unshare_works(disk):
        pytest.skip("no unprivileged mount namespaces here (unshare --user --mount): a small disk cannot be made")
    write_traces(session / "long.h5", 100.0 + np.random.default_rng(0).normal(0.0, 1.0, (3, 2000)),
                 frame_rate=RATE)  # (48 kB of ΔF/F: more than the disk holds)
    config = _toml(session / "run.toml", inputs={"traces": "long.h5"}, output={"folder": str(disk / "out")},
                   execution={"backend": "serial"})
    calcium = Path(sys.executable).with_name("calcium")
    outputs = {f"dff long.h5 --out {disk}/dff.h5": "dff.h5", f"dff long.h5 --out {disk}/dff.npy": "dff.npy",
               f"dff long.h5 --out {disk}/dff.csv": "dff.csv", f"run {config}": "results.h5"}
    script = [f"mount -t tmpfs -o size=16k tmpfs '{disk}' || exit 99"]
    for command in outputs:  # the exit code, then the last line on stderr (a .npy warning may come first)
        script.append(f"said=$('{calcium}' {command} --quiet 2>&1 >/dev/null); echo \"$? $(echo \"$said\" | tail -n 1)\"")
    script.append(f"find '{disk}' -type f")  # (the disk goes with the namespace: look now)
    before = _files(session)
    done = subprocess.run(["unshare", "--user", "--map-root-user", "--mount", "sh", "-c", "\n".join(script)],
                          cwd=session, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.strip().splitlines()
    assert len(lines) == len(outputs), done.stdout  # one line per command, and no file left on the disk
    for line, name in zip(lines, outputs.values()):
        assert line.startswith("1 calcium ") and f"{name}: no space left on the device" in line, line
    assert _files(session) == before


# ---------------------------------------------------------------------------
# F0 exactly 0 (an all-zero ROI, dim photon counts): a flagged ROI in a run, one line from the CLI
# ---------------------------------------------------------------------------
@pytest.fixture
def dark_roi(session, recording):
    """traces.h5 with ROI 1 all zero and ROI 2 dim (a photon count now and then: its 8th percentile is 0)."""
    raw = recording.raw.copy()
    raw[1] = 0.0
    raw[2] = (np.random.default_rng(5).random(raw.shape[1]) < 0.05).astype(float)
    write_traces(session / "dark.h5", raw, frame_rate=RATE)
    return session / "dark.h5"


def test_a_run_flags_rois_whose_f0_is_exactly_zero_and_analyses_the_others(session, dark_roi):
    from calcium.pipeline import open_results, stages

    config = _toml(session / "run.toml", inputs={"traces": dark_roi.name}, output={"folder": "out"},
                   report={"enabled": False}, execution={"backend": "serial"})
    before = _sha(dark_roi)
    assert main(["run", str(config), "--quiet"]) == 0
    with open_results(session / "out" / "results.h5") as results:
        flags, reasons = results.read("quality_flags"), results.read("flags")
        assert results.complete and np.isfinite(results.read("dff", 0)).all()
    for roi in (1, 2):
        assert flags[roi] & stages.FLAG_FAILED and flags[roi] & stages.FLAG_F0, (roi, reasons[roi])
        assert "exactly 0" in reasons[roi]
    assert not flags[0] & stages.FLAG_FAILED and _sha(dark_roi) == before


def test_dff_of_a_roi_whose_f0_is_exactly_zero_is_one_line_naming_it(session, dark_roi, capsys):
    before = _files(session)
    assert main(["dff", dark_roi.name, "--out", "dff.h5", "--quiet"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "exactly 0 in ROI(s) 1, 2" in err[0] and "floor" in err[0], err
    assert _files(session) == before
    assert main(["dff", dark_roi.name, "--out", "dff.h5", "--floor", "1", "--quiet"]) == 0  # the named remedy


def test_overwrite_still_replaces_the_outputs_of_an_earlier_run(session):
    # (the control of the refusals above: --overwrite replaces outputs, it is only never aimed at an input)
    config = _run_config(session, traces="traces.h5")
    inputs = _sha(session / "traces.h5")
    assert main(["run", str(config), "--quiet"]) == 0
    first = _sha(session / "results.h5")
    changed = _toml(session / "run.toml", inputs={"traces": "traces.h5"}, output={"folder": "."},
                    report={"enabled": False}, execution={"backend": "serial"}, dff={"window_s": 20.0})
    assert main(["run", str(changed), "--quiet"]) == 1  # another run's results: refused without --overwrite
    assert main(["run", str(changed), "--overwrite", "--quiet"]) == 0
    assert _sha(session / "results.h5") != first and _sha(session / "traces.h5") == inputs


# ---------------------------------------------------------------------------
# garbage in: refused with the flag that lets the user insist, or flagged in the output
# ---------------------------------------------------------------------------
GARBAGE = [
    # raw fluorescence given to infer (the 10th percentile of ΔF/F is near 0 at rest: Grienberger & Konnerth
    # 2012; raw counts sit far above 1)
    (["infer", "traces.h5", "--out", "spikes.h5", "--workers", "1"], "looks like raw fluorescence", "--allow-raw"),
    # a decay without a spike size: refused, not completed with an invented 1.0
    (["predict", "ephys.csv", "--frame-rate", "20", "--decay-s", "0.5", "--out", "p.npy"], "--spike-size", None),
    # the frame period given as the frame rate
    (["noise", "noise.npy", "--frame-rate", "0.0333"], "frame period", None),
]


@pytest.mark.parametrize("argv, fragment, remedy", GARBAGE, ids=["raw to infer", "decay without size",
                                                                 "period as rate"])
def test_garbage_is_refused_naming_what_to_change_and_nothing_is_written(session, argv, fragment, remedy, capsys):
    np.save(session / "noise.npy", np.random.default_rng(0).normal(0.0, 0.05, (3, 400)))
    before = _files(session)
    code = main(argv + ["--quiet"])
    err = capsys.readouterr().err
    assert code in (1, 2) and fragment in err and len(err.strip().splitlines()) == 1, err
    if remedy is not None:
        assert remedy in err and "allow_raw" not in err  # the CLI names its flag, not the API keyword
    assert _files(session) == before


def test_raw_fluorescence_with_allow_raw_is_analysed_and_every_roi_flagged(session):
    from calcium.io import read_hdf5

    before = _sha(session / "traces.h5")
    assert main(["infer", "traces.h5", "--out", "spikes.h5", "--workers", "1", "--allow-raw", "--quiet"]) == 0
    data, _ = read_hdf5(session / "spikes.h5")
    assert np.all(data["quality_flags"] & 64)  # 64: uncalibrated counts
    assert all("raw fluorescence" in text for text in data["flags"])
    assert _sha(session / "traces.h5") == before
