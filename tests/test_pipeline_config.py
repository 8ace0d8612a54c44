"""Tests for calcium/pipeline/config.py: the TOML template, loading, and the error messages."""
import dataclasses
import inspect
import os
import sys

import pytest

from calcium.pipeline.config import (
    ConfigError,
    RunConfig,
    config_from_dict,
    load_config,
    template_text,
    write_config_template,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

SECTIONS = ("inputs", "output", "extraction", "dff", "filter", "rhythms", "noise", "inference", "calibration",
            "quality", "kernel_fit", "scoring", "report", "nwb", "execution")


def _write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


def _minimal(tmp_path, extra=""):
    return _write(tmp_path / "run.toml", '[inputs]\ntraces = "traces.npy"\nframe_rate = 30.0\n' + extra)


def test_template_is_valid_toml_listing_every_key_of_every_section(tmp_path):
    # Reference: the TOML parser of the standard library (tomllib) reads the file; every
    # dataclass field appears either as a key or as a commented-out optional key.
    path = write_config_template(tmp_path / "session.toml")
    text = path.read_text(encoding="utf-8")
    data = tomllib.loads(text)
    assert tuple(data) == SECTIONS
    for name in SECTIONS:
        section = getattr(RunConfig, "__dataclass_fields__")[name].default_factory()
        for field in dataclasses.fields(section):
            if field.default is None and field.name not in data[name]:
                assert f"# {field.name} = " in text, f"{name}.{field.name} not listed"
            else:
                assert field.name in data[name], f"{name}.{field.name} missing"


def test_template_loads_back_to_the_defaults(tmp_path):
    path = write_config_template(tmp_path / "session.toml")
    config = load_config(path)
    assert config.dff.window_s == 60.0 and config.execution.backend == "processes"
    assert config.inputs.traces == (tmp_path / "traces.h5").resolve()
    assert config.output.folder == (tmp_path / "results").resolve()
    fresh = config_from_dict({"inputs": {"traces": "traces.h5"}}, base=tmp_path)
    assert fresh.to_dict() == config.to_dict()


def test_template_defaults_match_the_defaults_of_the_stage_functions():
    # Reference: the signatures of the public functions each section configures.
    from calcium.extract import extract_traces
    from calcium.fit import fit_kernel
    from calcium.infer import infer_spikes
    from calcium.score import DEFAULT_BIN_WIDTHS_S
    from calcium.signal import delta_f_over_f, design_filter, estimate_noise

    config = config_from_dict({"inputs": {"traces": "t.npy"}})

    def defaults(function):
        return {k: p.default for k, p in inspect.signature(function).parameters.items()
                if p.default is not inspect.Parameter.empty}

    for key, value in defaults(delta_f_over_f).items():
        assert getattr(config.dff, key) == value, key
    extract = defaults(extract_traces)
    for key in ("neuropil_gap_px", "neuropil_radius_px", "neuropil_factor", "chunk_frames"):
        assert getattr(config.extraction, key) == extract[key], key
    design = defaults(design_filter)
    assert (config.filter.order, config.filter.method) == (design["order"], design["method"])
    fit = defaults(fit_kernel)
    for key in ("model", "max_lag_s", "n_bootstrap", "confidence", "seed", "min_isolated_spikes"):
        assert getattr(config.kernel_fit, key) == fit[key], key
    assert config.scoring.bin_widths_s == tuple(DEFAULT_BIN_WIDTHS_S)
    infer = defaults(infer_spikes)
    for key in ("indicator", "spike_size", "penalty", "order", "threshold"):
        assert getattr(config.inference, key) == infer[key], key
    noise = defaults(estimate_noise)
    assert (config.noise.band_hz, config.noise.average) == (noise["band_hz"], noise["average"])


def test_template_refuses_to_overwrite_an_existing_file(tmp_path):
    path = _write(tmp_path / "session.toml", "# my settings\n")
    with pytest.raises(FileExistsError, match="session.toml"):
        write_config_template(path)
    assert path.read_text() == "# my settings\n"


def test_unknown_key_is_named_with_its_section_and_the_allowed_keys(tmp_path):
    path = _minimal(tmp_path, "[dff]\nwindow = 30.0\n")
    with pytest.raises(ConfigError, match=r"dff\.window\b.*window_s, percentile, smooth_s, floor"):
        load_config(path)


def test_unknown_section_is_an_error(tmp_path):
    with pytest.raises(ConfigError, match=r"\[deconvolution\]"):
        load_config(_minimal(tmp_path, "[deconvolution]\npenalty = 1\n"))


@pytest.mark.parametrize("line, key, value, allowed", [
    ("[dff]\nwindow_s = -5.0", "dff.window_s", "-5.0", "> 0"),
    ("[dff]\npercentile = 150", "dff.percentile", "150", "<= 100"),
    ("[quality]\nmax_missing_fraction = 1.5", "quality.max_missing_fraction", "1.5", "<= 1"),
    ("[execution]\nbackend = \"gpu\"", "execution.backend", "'gpu'", '"serial", "processes", "dask"'),
    ("[execution]\nworkers = -1", "execution.workers", "-1", "from 0 to 100000"),
    ("[execution]\nchunk_rois = 2.5", "execution.chunk_rois", "2.5", "whole number"),
    ("[report]\nenabled = \"yes\"", "report.enabled", "'yes'", "true or false"),
    ("[filter]\norder = 0", "filter.order", "0", "from 1 to 64"),
    ("[kernel_fit]\nconfidence = 1.0", "kernel_fit.confidence", "1.0", "< 1"),
    ("[extraction]\nneuropil_factor = \"guess\"", "extraction.neuropil_factor", "'guess'", '"estimate"'),
])
def test_out_of_range_value_names_key_value_and_allowed_range(tmp_path, line, key, value, allowed):
    with pytest.raises(ConfigError) as info:
        load_config(_minimal(tmp_path, line + "\n"))
    message = str(info.value)
    assert key in message and value in message and allowed in message


def test_relative_paths_are_resolved_against_the_configuration_folder(tmp_path, monkeypatch):
    folder = tmp_path / "configs"
    folder.mkdir()
    _write(folder / "run.toml", '[inputs]\ntraces = "../data/t.h5"\nelectrical_spikes = "e.csv"\n'
                                '[output]\nfolder = "out"\n')
    monkeypatch.chdir(tmp_path)  # a different working folder must not matter
    config = load_config("configs/run.toml")
    assert config.inputs.traces == (tmp_path / "data" / "t.h5").resolve()
    assert config.inputs.electrical_spikes == (folder / "e.csv").resolve()
    assert config.output.folder == (folder / "out").resolve()
    absolute = tmp_path / "abs.npy"
    config = load_config(_write(folder / "abs.toml", f'[inputs]\ntraces = "{absolute.as_posix()}"\n'))
    assert config.inputs.traces == absolute


@pytest.mark.parametrize("inputs, message", [
    ('traces = "t.npy"\nmovie = "m.tif"\nmasks = "k.tif"', "both given"),
    ('movie = "m.tif"', "inputs.movie was given without inputs.masks"),
    ('frame_rate = 30.0', "give inputs.traces"),
    ('traces = "t.npy"\ntraces_dataset = "x"', "only applies to HDF5"),
])
def test_inconsistent_inputs_are_refused(tmp_path, inputs, message):
    with pytest.raises(ConfigError, match=message):
        load_config(_write(tmp_path / "run.toml", "[inputs]\n" + inputs + "\n"))


def test_bandpass_needs_two_ordered_cutoffs(tmp_path):
    with pytest.raises(ConfigError, match=r"filter\.cutoff_hz.*\[low, high\]"):
        load_config(_minimal(tmp_path, '[filter]\nkind = "bandpass"\ncutoff_hz = 2.0\n'))
    with pytest.raises(ConfigError, match="low must be below high"):
        load_config(_minimal(tmp_path, '[filter]\nkind = "bandstop"\ncutoff_hz = [5.0, 1.0]\n'))
    config = load_config(_minimal(tmp_path, '[filter]\nkind = "bandpass"\ncutoff_hz = [0.1, 5]\n'))
    assert config.filter.cutoff_hz == (0.1, 5.0)


def test_kernel_times_come_in_pairs_with_rise_shorter_than_decay(tmp_path):
    with pytest.raises(ConfigError, match="rise_s and inference.decay_s must be given together"):
        load_config(_minimal(tmp_path, "[inference]\ndecay_s = 1.0\n"))
    with pytest.raises(ConfigError, match="shorter than"):
        load_config(_minimal(tmp_path, "[inference]\nrise_s = 2.0\ndecay_s = 1.0\n"))


def test_invalid_toml_and_missing_file_are_config_errors(tmp_path):
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(_write(tmp_path / "bad.toml", "[inputs\ntraces = 1\n"))
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "absent.toml")


def test_to_toml_round_trips_through_the_toml_parser(tmp_path):
    # Reference: tomllib parses what to_toml writes back into the same configuration.
    config = load_config(_minimal(tmp_path, '[filter]\nkind = "lowpass"\ncutoff_hz = 4.0\n'
                                            '[scoring]\nbin_widths_s = [0.05, 0.5]\n'
                                            '[nwb]\nsession_description = "mouse 3, \\"quoted\\" day"\n'))
    again = config_from_dict(tomllib.loads(config.to_toml()), base=tmp_path)
    assert again == config


def test_results_hash_ignores_execution_and_report_settings(tmp_path):
    config = load_config(_minimal(tmp_path))
    other = config.replace(execution={"backend": "dask", "workers": 7}, report={"n_examples": 2},
                           output={"folder": "elsewhere"})
    assert other.result_parameters() == config.result_parameters()
    changed = config.replace(dff={"window_s": 30.0})
    assert changed.result_parameters()["dff"]["window_s"] == 30.0
    with pytest.raises(ConfigError, match=r"dff\.window_s"):
        config.replace(dff={"window_s": 0})


def test_error_messages_name_the_file(tmp_path):
    path = _minimal(tmp_path, "[dff]\nsmooth_s = -1\n")
    with pytest.raises(ConfigError, match=os.path.basename(path)):
        load_config(path)


def test_template_text_mentions_how_to_run_it():
    assert "calcium run session.toml" in template_text("session.toml")
