"""The ``invert`` command: help texts, ``check``, exit codes and messages, ``synth``, ``run``.

Most commands are run in-process through ``invert.cli.main`` (fast); one test runs the
installed ``invert`` script in a subprocess to check the entry point and the exit status
seen by a shell. All data are small synthetic tables for invented surveys.
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from invert.cli import build_parser, main
from invert.data import read_picks

pytestmark = pytest.mark.filterwarnings("ignore:More chains:UserWarning")

LINE_PICKS = """\
# synthetic: P first arrivals over an invented site, 600 m/s over 1800 m/s, interface at 5 m;
# exact first-arrival times rounded to 0.1 ms; metres and seconds
source,receiver,wave,time,sigma,distance,source_depth,receiver_depth
A,g01,P,0.0050,0.0005,3,0,0
A,g02,P,0.0100,0.0005,6,0,0
A,g03,P,0.0150,0.0005,9,0,0
A,g04,P,0.0200,0.0005,12,0,0
A,g05,P,0.0240,0.0005,15,0,0
A,g06,P,0.0257,0.0005,18,0,0
A,g07,P,0.0274,0.0005,21,0,0
A,g08,P,0.0290,0.0005,24,0,0
A,g09,P,0.0307,0.0005,27,0,0
A,g10,P,0.0324,0.0005,30,0,0
"""

GOOD_RUN = """\
title = "synthetic two-layer line (command-line checks)"
units = "m"
[data]
picks = "picks.csv"
[model]
layers = 1
vpvs_mode = "none"
[prior]
thickness_1 = { dist = "uniform", low = 1.0, high = 15.0 }
vp_1 = { dist = "uniform", low = 200.0, high = 1200.0 }
vp_2 = { dist = "uniform", low = 1000.0, high = 3000.0 }
[sampler]
walkers = 12
ensembles = 1
steps = 40
burn = 10
seed = 5
start = "prior"
[output]
folder = "run"
"""


@pytest.fixture
def good(tmp_path):
    (tmp_path / "picks.csv").write_text(LINE_PICKS)
    (tmp_path / "run.toml").write_text(GOOD_RUN)
    return tmp_path / "run.toml"


def _invert_command() -> list[str]:
    script = Path(sys.executable).with_name("invert")
    return [str(script)] if script.exists() else [sys.executable, "-m", "invert.cli"]


# ---------------------------------------------------------------------------- help
def help_text(argv, capsys) -> str:
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 0
    return capsys.readouterr().out


def test_top_level_help_lists_the_subcommands(capsys):
    text = help_text(["--help"], capsys)
    for command in ("run", "check", "synth", "report"):
        assert re.search(rf"^\s+{command}\s+\S", text, re.MULTILINE), f"no help line for '{command}'"
    assert "licensed professionals" in text  # the caution of the README is part of the help


# the options each subcommand is documented to take
OPTIONS = {
    "run": ["config", "--resume", "--overwrite", "--steps", "--report", "--strict", "--quiet", "--no-progress"],
    "check": ["config"],
    "synth": ["spec"],
    "report": ["run_dir", "--png"],
}


@pytest.mark.parametrize("command", list(OPTIONS))
def test_subcommand_help_mentions_its_options(command, capsys):
    text = help_text([command, "--help"], capsys)
    for option in OPTIONS[command]:
        assert option in text, f"{option} missing from 'invert {command} --help'"


def test_every_option_has_a_help_text():
    parser = build_parser()
    sub = next(a for a in parser._actions if a.choices and isinstance(a.choices, dict))
    for name, subparser in sub.choices.items():
        for action in subparser._actions:
            if action.dest != "help":
                assert action.help and len(action.help) > 10, f"invert {name}: {action.dest} has no help"


def test_missing_argument_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as info:
        main(["run"])
    assert info.value.code == 2
    assert "config" in capsys.readouterr().err


# ---------------------------------------------------------------------------- check
def test_check_good_config_prints_the_parameters(good, capsys):
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert str(good) in out
    for name in ("thickness_1", "vp_1", "vp_2"):
        assert name in out
    assert "3 free parameters" in out
    vp_1 = next(line for line in out.splitlines() if line.startswith("vp_1"))
    assert "200" in vp_1 and "1200" in vp_1 and "m/s" in vp_1  # the prior as given, with its unit
    assert "10 picks" in out


BAD = [
    # (id, text replaced -> replacement, the key as it must appear on stderr)
    ("typo", ("walkers = 12", "walker = 12"), "'walker'"),
    ("odd-walkers", ("walkers = 12", "walkers = 13"), "walkers = 13"),
    ("burn-not-below-steps", ("burn = 10", "burn = 40"), "burn = 40"),
    ("unknown-vpvs-mode", ('vpvs_mode = "none"', 'vpvs_mode = "ratio"'), "vpvs_mode = 'ratio'"),
    ("missing-picks-file", ('picks = "picks.csv"', 'picks = "gone.csv"'), "picks = "),
    ("missing-prior", ('vp_2 = { dist = "uniform", low = 1000.0, high = 3000.0 }', ""), "prior.vp_2"),
]


@pytest.mark.parametrize("old_new, key", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_check_bad_config_exits_2_naming_the_key(good, capsys, old_new, key):
    old, new = old_new
    good.write_text(GOOD_RUN.replace(old, new))
    assert main(["check", str(good)]) == 2
    captured = capsys.readouterr()
    assert captured.err.startswith("error: ")
    assert key in captured.err and str(good) in captured.err
    assert "Traceback" not in captured.err


def test_bad_data_file_exits_2_naming_file_and_line(good, capsys):
    (good.parent / "picks.csv").write_text(LINE_PICKS.replace("A,g03,P,0.0150", "A,g03,P,soon"))
    assert main(["check", str(good)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "picks.csv" in err and "line 6" in err and "time" in err


def test_installed_command_exit_status_and_stderr(good):
    # the console script itself: a shell sees status 2 and a one-line error naming the key
    good.write_text(GOOD_RUN.replace("walkers = 12", "walkers = 13"))
    proc = subprocess.run(_invert_command() + ["check", str(good)], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 2
    assert proc.stderr.startswith("error: ") and "walkers" in proc.stderr
    assert proc.stdout == ""


# ---------------------------------------------------------------------------- synth
LINE_SPEC = """\
title = "synthetic line over an invented two-layer site"
units = "m"
seed = 3
[model]
thickness = [5.0]
vp = [600.0, 1800.0]
vpvs = [2.0, 2.0]
[survey]
kind = "line"
shots = [0.0, 40.0]
receivers = { first = 2.0, last = 38.0, spacing = 4.0 }
waves = ["P"]
sigma = 0.0005
[output]
picks = "line.csv"
"""


def refraction_first_arrival(x, h, v1, v2):
    """First arrival over one layer on a half-space, surface shot and receiver (common practice):
    the earlier of the direct wave x / v1 and the head wave x / v2 + 2 h cos(i) / v1, sin(i) = v1 / v2."""
    direct = x / v1
    head = x / v2 + 2.0 * h * np.sqrt(1.0 - (v1 / v2) ** 2) / v1
    return np.minimum(direct, head)


def test_synth_writes_picks_that_read_back(tmp_path, capsys):
    spec = tmp_path / "survey.toml"
    spec.write_text(LINE_SPEC)
    assert main(["synth", str(spec)]) == 0
    assert "line.csv" in capsys.readouterr().out
    picks = read_picks(tmp_path / "line.csv")
    assert picks.n_picks == 2 * 10  # two shots x ten receivers, P only
    assert set(np.asarray(picks.wave)) == {"P"} and np.all(np.asarray(picks.sigma) == 0.0005)
    x = np.asarray(picks.distance)
    assert sorted(set(x.tolist())) == [2.0, 6.0, 10.0, 14.0, 18.0, 22.0, 26.0, 30.0, 34.0, 38.0]
    z = (np.asarray(picks.time) - refraction_first_arrival(x, 5.0, 600.0, 1800.0)) / 0.0005
    assert np.all(np.abs(z) < 5) and 0.5 < z.std() < 1.6  # true times plus noise of the stated size
    # same seed, same file; the header comment says the picks are synthetic
    first = (tmp_path / "line.csv").read_text()
    assert main(["synth", str(spec)]) == 0
    assert (tmp_path / "line.csv").read_text() == first
    assert first.startswith("# synthetic")


NETWORK_SPEC = """\
title = "synthetic two-event network in an invented region"
units = "km"
seed = 8
[model]
thickness = [30.0]
vp = [6.2, 8.0]
vpvs = [1.75, 1.75]
[survey]
kind = "network"
waves = ["P", "S"]
sigma = { P = 0.05, S = 0.1 }
events = [{ name = "e1", x = 0.0, y = 0.0, depth = 8.0, origin_time = 2.0 },
          { name = "e2", x = 10.0, y = 5.0, depth = 15.0, origin_time = 40.0 }]
stations = [{ name = "s1", x = 20.0, y = 0.0 }, { name = "s2", x = -35.0, y = 10.0 },
            { name = "s3", x = 60.0, y = -40.0 }]
[output]
picks = "quakes.csv"
"""


def test_synth_network_writes_tables_that_read_back(tmp_path):
    spec = tmp_path / "survey.toml"
    spec.write_text(NETWORK_SPEC)
    assert main(["synth", str(spec)]) == 0
    picks = read_picks(tmp_path / "quakes.csv", tmp_path / "sources.csv", tmp_path / "receivers.csv")
    assert picks.n_picks == 2 * 3 * 2
    assert not np.any(picks.depth_known) and not np.any(picks.origin_time_known)


def test_synth_bad_spec_exits_2(tmp_path, capsys):
    spec = tmp_path / "survey.toml"
    spec.write_text(LINE_SPEC.replace('kind = "line"', 'kind = "lien"'))
    assert main(["synth", str(spec)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "kind" in err and "survey.toml" in err


# ---------------------------------------------------------------------------- run
def test_run_steps_override_and_strict_exit_status(good, capsys):
    # one ensemble can never be called converged, so --strict gives status 3; --steps
    # overrides [sampler] steps
    assert main(["run", str(good), "--steps", "30", "--quiet", "--no-progress", "--strict"]) == 3
    summary = (good.parent / "run" / "convergence.json").read_text()
    assert '"kept_steps": 20' in summary
    # a second run into the same folder needs --overwrite (or --resume)
    assert main(["run", str(good), "--quiet", "--no-progress"]) == 2
    assert "--overwrite" in capsys.readouterr().err


# ---------------------------------------------------------------------------- first-hour messages
def test_check_says_once_whether_the_intercept_time_estimate_is_usable(good, capsys):
    # The estimate is printed; a Vs prior whose median (600 m/s) is about the P velocity of the
    # top layer makes the start invalid (Vp/Vs near 1, not above sqrt(4/3): the bulk modulus
    # rho (Vp^2 - 4 Vs^2 / 3) would be negative; common practice). The output must not then
    # claim there is no estimate.
    text = GOOD_RUN.replace('vpvs_mode = "none"', 'vpvs_mode = "vs"').replace(
        "[sampler]", 'vs_1 = { dist = "uniform", low = 400.0, high = 800.0 }\n'
                     'vs_2 = { dist = "uniform", low = 400.0, high = 800.0 }\n[sampler]')
    good.write_text(text)
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "Intercept-time estimate" in out
    assert "no intercept-time estimate" not in out
    assert "not used as a starting point" in out and "vs_1" in out


def test_check_without_surface_picks_says_why_there_is_no_estimate(good, capsys):
    picks = LINE_PICKS.replace(",0,0\n", ",0,2\n")  # every receiver 2 m down a hole
    (good.parent / "picks.csv").write_text(picks)
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "Intercept-time estimate" not in out
    assert "no intercept-time estimate" in out and "surface" in out


def test_run_with_too_few_walkers_is_a_config_error(good, capsys):
    good.write_text(GOOD_RUN.replace("walkers = 12", "walkers = 4"))
    assert main(["run", str(good), "--quiet", "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "[sampler]" in err and "walkers = 4" in err and "6" in err
    assert not (good.parent / "run").exists()


def test_run_shows_no_chain_layout_warning(good, recwarn):
    # 24 walkers (one chain each) x 20 kept draws: arviz's "More chains than draws" guess
    # would fire; the run silences that one warning.
    import warnings

    warnings.simplefilter("always")
    good.write_text(GOOD_RUN.replace("walkers = 12", "walkers = 24"))
    assert main(["run", str(good), "--steps", "30", "--quiet", "--no-progress"]) == 0
    assert not [w for w in recwarn if "More chains" in str(w.message)]


def test_chain_layout_filter_lets_other_warnings_through():
    import warnings

    from invert.run import chain_layout_warning_off

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with chain_layout_warning_off():
            warnings.warn("More chains (56) than draws (40). Passed array should have shape", UserWarning)
            warnings.warn("something else went wrong", UserWarning)
            warnings.warn("More chains (56) than draws (40)", RuntimeWarning)
    texts = [(w.category, str(w.message)) for w in caught]
    assert (UserWarning, "something else went wrong") in texts
    assert (RuntimeWarning, "More chains (56) than draws (40)") in texts
    assert len(texts) == 2


def test_check_with_waves_keeps_only_those_picks(good, capsys):
    # ten P picks plus two invented S picks; waves = ["P"] inverts the P picks alone, unedited file
    (good.parent / "picks.csv").write_text(LINE_PICKS + "A,g01,S,0.0150,0.001,3,0,0\nA,g02,S,0.0300,0.001,6,0,0\n")
    good.write_text(GOOD_RUN.replace('picks = "picks.csv"', 'picks = "picks.csv"\nwaves = ["P"]'))
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "10 of the 12 picks" in out and "left out" in out
    good.write_text(GOOD_RUN.replace('picks = "picks.csv"', 'picks = "picks.csv"\nwaves = ["Q"]'))
    assert main(["check", str(good)]) == 2
    err = capsys.readouterr().err
    assert str(good) in err and "[data] waves" in err and "unknown wave 'Q'" in err


# ---------------------------------------------------------------------------- unit mix-ups (newcomer trial)
def _scaled(text: str, columns, factor: float) -> str:
    """LINE_PICKS with the given columns multiplied by ``factor`` (a unit mix-up)."""
    out, header = [], None
    for line in text.splitlines():
        if line.startswith("#"):
            out.append(line)
            continue
        cells = line.split(",")
        if header is None:
            header = cells
        else:
            for c in columns:
                i = header.index(c)
                cells[i] = repr(float(cells[i]) * factor)
        out.append(",".join(cells))
    return "\n".join(out) + "\n"


KM_RUN = (GOOD_RUN.replace('units = "m"', 'units = "km"')
          .replace("low = 1.0, high = 15.0", "low = 0.001, high = 0.015")
          .replace("low = 200.0, high = 1200.0", "low = 0.2, high = 1.2")
          .replace("low = 1000.0, high = 3000.0", "low = 1.0, high = 3.0"))


def test_check_good_picks_give_no_unit_warning(good, capsys):
    # LINE_PICKS: 600 m/s over 1800 m/s, inside 50 m/s - 15 km/s for P (common practice)
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "WARNING" not in out and "Everything reads and checks out" in out


def test_check_warns_when_times_are_in_milliseconds(good, capsys):
    # the same picks with time and sigma in ms: apparent velocities 0.6-0.9 m/s
    (good.parent / "picks.csv").write_text(_scaled(LINE_PICKS, ["time", "sigma"], 1000.0))
    assert main(["check", str(good)]) == 0  # a warning, not a refusal
    out = capsys.readouterr().out
    assert "WARNING" in out and "milliseconds" in out and "divide both columns by 1000" in out
    assert "Everything reads and checks out" not in out


def test_check_warns_when_distances_are_in_km_with_units_m(good, capsys):
    (good.parent / "picks.csv").write_text(_scaled(LINE_PICKS, ["distance"], 1e-3))
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "WARNING" in out and "kilometres" in out and 'units = "m"' in out
    assert "Everything reads and checks out" not in out


def test_check_warns_when_distances_are_in_m_with_units_km(good, capsys):
    good.write_text(KM_RUN)  # priors in km and km/s, but the picks' distances are still metres
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "WARNING" in out and "metres" in out and 'units = "km"' in out
    assert "600-905 km/s" in out  # 3 m / 0.005 s ... 30 m / 0.0324 s read as km


def test_check_warns_when_velocities_are_far_outside_the_prior(good, capsys):
    # picks right for metres, but the prior written in km/s numbers (0.2-3) with units = "m"
    good.write_text(KM_RUN.replace('units = "km"', 'units = "m"').replace("low = 0.001, high = 0.015",
                                                                          "low = 1.0, high = 15.0"))
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "WARNING" in out and "the prior's P velocities" in out and "priors are written in other units" in out


def test_run_warns_about_units_at_the_start(good, capsys):
    (good.parent / "picks.csv").write_text(_scaled(LINE_PICKS, ["time", "sigma"], 1000.0))
    assert main(["run", str(good), "--steps", "20", "--no-progress"]) == 0
    captured = capsys.readouterr()
    assert "WARNING" in captured.err and "milliseconds" in captured.err


def test_check_refuses_a_prior_with_zero_support(good, capsys):
    # head waves from the base of a layer at least 10 m thick appear only beyond the critical
    # distance 2 h tan(asin(v1 / v2)) >= 2 * 10 * 200 / sqrt(3000**2 - 200**2) = 1.34 m (Telford,
    # Geldart & Sheriff, Applied Geophysics, 2nd ed., 1990, sec. 4.2; from memory): picks at
    # 0.5 and 1 m have no model under this prior
    (good.parent / "picks.csv").write_text(
        "source,receiver,wave,time,sigma,distance,source_depth,receiver_depth,branch,interface\n"
        "A,g01,P,0.0200,0.0005,0.5,0,0,head,1\nA,g02,P,0.0210,0.0005,1.0,0,0,head,1\n")
    good.write_text(GOOD_RUN.replace("low = 1.0, high = 15.0", "low = 10.0, high = 15.0"))
    assert main(["check", str(good)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "zero support" in err


# ---------------------------------------------------------------------------- resume
@pytest.mark.parametrize("change, words", [
    ("picks", "the picks"),
    ("prior", "the priors"),
    ("walkers", "walkers = 12 then, 14 now"),
])
def test_resume_after_a_change_is_a_clean_error(good, capsys, change, words):
    assert main(["run", str(good), "--quiet", "--no-progress"]) == 0
    if change == "picks":
        (good.parent / "picks.csv").write_text(LINE_PICKS.replace("A,g10,P,0.0324", "A,g10,P,0.0330"))
    elif change == "prior":
        good.write_text(GOOD_RUN.replace("high = 3000.0", "high = 3500.0"))
    else:
        good.write_text(GOOD_RUN.replace("walkers = 12", "walkers = 14"))
    assert main(["run", str(good), "--resume", "--quiet", "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "Traceback" not in err
    assert "cannot resume" in err and words in err and "--overwrite" in err and "[output] folder" in err


def test_not_converged_ends_with_the_command_to_continue(good, capsys):
    assert main(["run", str(good), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "NOT converged" in out
    match = re.search(r"invert run \S+run\.toml --resume --steps (\d+)", out)
    assert match and int(match.group(1)) >= 2 * 40  # at least twice the 40 steps taken


def test_resume_with_fewer_steps_says_so_and_report_states_the_real_length(good, capsys):
    assert main(["run", str(good), "--quiet", "--no-progress"]) == 0  # 40 steps
    assert main(["run", str(good), "--resume", "--steps", "80", "--no-progress"]) == 0
    assert main(["run", str(good), "--resume", "--steps", "30", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "--steps 30 is fewer than the 80 steps" in out
    assert main(["report", str(good.parent / "run"), "--png"]) == 0
    assert f"PNG files to {good.parent / 'run' / 'figures'}" in capsys.readouterr().out
    md = (good.parent / "run" / "report.md").read_text()
    assert "80 steps each" in md and "40 steps each" not in md


# ---------------------------------------------------------------------------- small things
def test_version_option(capsys):
    from invert import __version__

    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0 and __version__ in capsys.readouterr().out


def test_report_of_a_folder_without_a_run_names_the_folder(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["report", "."]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and str(tmp_path) in err


def test_synth_unknown_key_suggests_the_near_match(tmp_path, capsys):
    spec = tmp_path / "survey.toml"
    spec.write_text(LINE_SPEC.replace("seed =", "sed ="))
    assert main(["synth", str(spec)]) == 2
    err = capsys.readouterr().err
    assert "'sed'" in err and "did you mean 'seed'" in err


def test_synth_unknown_survey_key_suggests_the_near_match(tmp_path, capsys):
    spec = tmp_path / "survey.toml"
    spec.write_text(LINE_SPEC.replace("receivers =", "recievers ="))
    assert main(["synth", str(spec)]) == 2
    err = capsys.readouterr().err
    assert "survey" in err and "'recievers'" in err and "did you mean 'receivers'" in err
    assert not (tmp_path / "line.csv").exists()
    # a key meant for another kind (borehole 'depths' on a line) is not silently ignored either
    spec.write_text(LINE_SPEC.replace('kind = "line"', 'kind = "line"\ndepths = [1.0, 2.0]'))
    assert main(["synth", str(spec)]) == 2
    assert "'depths'" in capsys.readouterr().err


def test_report_png_of_a_low_velocity_zone_folder_says_where_the_figures_went(tmp_path, capsys):
    import json

    # a hand-made result of 'invert lvz-test' (invented numbers; only the report writing is exercised)
    test = {"layer": 2, "log_z_permissive": -10.0, "log_z_permissive_error": 0.2, "log_bayes_factor": -0.5,
            "log_bayes_factor_error": 0.3, "favours": "monotone", "strength": "not worth more than a bare mention",
            "prior_inversion_probability": 0.5, "posterior_inversion_probability": 0.2,
            "posterior_inversion_probability_error": 0.02, "one_run_log_bayes_factor_monotone": 0.47,
            "one_run_log_bayes_factor_monotone_error": 0.03, "one_run_upper_bound_only": False,
            "log_cap_monotone": 0.69, "one_run_agrees_with_two_runs": True, "estimators_agree": None,
            "sensitivity": [], "notes": [],
            "coverage": {"reflections_from_base_or_below": 3, "buried_sources_or_receivers": 0,
                         "first_arrivals_only": False}}
    doc = {"config": "synthetic.toml", "title": "synthetic", "units": "m", "settings": {},
           "monotone": {"log_z": -9.5, "log_z_error": 0.2, "estimators_agree": None, "notes": []}, "tests": [test]}
    (tmp_path / "lvz_test.json").write_text(json.dumps(doc))
    assert main(["report", str(tmp_path), "--png"]) == 0
    out = capsys.readouterr().out
    assert f"Figures written as PNG files to {tmp_path / 'figures'}/" in out
    assert (tmp_path / "figures" / "lvz_bayes_factors.png").is_file()
    assert main(["report", str(tmp_path)]) == 0
    assert "PNG" not in capsys.readouterr().out


def test_progress_bar_stays_silent_when_stderr_is_not_a_terminal(monkeypatch):
    import io

    from invert.sample import _progress_bar

    fake = io.StringIO()  # not a terminal, like a log file
    monkeypatch.setattr(sys, "stderr", fake)
    bar = _progress_bar(True, 10, 0)
    for _ in range(10):
        bar.update(1)
    bar.close()
    assert "\r" not in fake.getvalue() and fake.getvalue() == ""


def test_report_option_leaves_out_the_make_the_report_hint(good, capsys):
    from invert.run import run_inversion

    run_inversion(good, progress=False, report_hint=False)
    assert "make the report with" not in capsys.readouterr().out


def test_check_prints_the_shipped_prior_template_it_read(good, capsys):
    text = GOOD_RUN.split("[prior]")[0].replace('[model]\nlayers = 1\nvpvs_mode = "none"\n', "")
    good.write_text('prior_file = "shallow_site"\n' + text + GOOD_RUN[GOOD_RUN.index("[sampler]"):])
    assert main(["check", str(good)]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.startswith("Prior template: "))
    assert line.endswith("shallow_site.toml") and Path(line.split(": ", 1)[1]).is_file()
