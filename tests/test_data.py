"""Tests of invert.data: reading, validating and writing picks and geometry.

Expected values come from the CSV text written in each test (or in tests/data/,
whose construction is stated in its comment lines) and from hand arithmetic,
never from the reader's own output.
"""

from __future__ import annotations

import math
import os
import tempfile

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from invert.data import (DataError, PickSet, offset_message, offset_mismatch, read_picks,
                         reciprocal_mismatch, reciprocity_message, write_picks)

DATA = os.path.join(os.path.dirname(__file__), "data")

H = "source,receiver,wave,time,sigma,distance,source_depth,receiver_depth"
ROW = "S1,R1,P,0.01,0.001,5,0,0"
TABLE_PICKS = "source,receiver,wave,time,sigma\nS1,R1,P,0.01,0.001\n"
SOURCES = "source,x,y,depth\nS1,0,0,0\n"
RECEIVERS = "receiver,x,y,depth\nR1,3,4,0\nR2,6,8,0\n"


def _write(folder, files):
    paths = {}
    for name, content in files.items():
        path = os.path.join(folder, name)
        with open(path, "wb") as f:
            f.write(content if isinstance(content, bytes) else content.encode("utf-8"))
        paths[name] = path
    return paths


def _read(folder, files):
    paths = _write(folder, files)
    return read_picks(paths["picks.csv"], paths.get("sources.csv"), paths.get("receivers.csv"))


# ---------------------------------------------------------------------------
# Every error: (files, file named, line, column, fragment of the message)
# ---------------------------------------------------------------------------
ERRORS = {
    "empty file": ({"picks.csv": ""}, "picks.csv", None, None, "empty"),
    "comments only": ({"picks.csv": "# synthetic\n\n   \n"}, "picks.csv", None, None, "empty"),
    "header only": ({"picks.csv": f"# synthetic\n{H}\n"}, "picks.csv", 2, None, "no picks rows"),
    "typo in column": ({"picks.csv": H.replace("time", "tme") + "\n" + ROW + "\n"}, "picks.csv", 1, "time",
                       "'tme' may be a typo for 'time'"),
    "missing column": ({"picks.csv": H.replace(",sigma", "") + "\nS1,R1,P,0.01,5,0,0\n"}, "picks.csv", 1,
                       "sigma", "columns found: source, receiver, wave, time, distance"),
    "unknown column": ({"picks.csv": H + ",note\n" + ROW + ",x\n"}, "picks.csv", 1, "note",
                       "allowed columns in a picks file: source, receiver"),
    "unknown column, close name": ({"picks.csv": H + ",branchh\n" + ROW + ",\n"}, "picks.csv", 1, "branchh",
                                   "did you mean 'branch'"),
    "column twice": ({"picks.csv": H + ",time\n" + ROW + ",0.01\n"}, "picks.csv", 1, "time", "twice"),
    "semicolons": ({"picks.csv": H.replace(",", ";") + "\n" + ROW.replace(",", ";") + "\n"}, "picks.csv", 1,
                   None, "separated by commas"),
    "short row": ({"picks.csv": f"{H}\nS1,R1,P,0.01,0.001,5,0\n"}, "picks.csv", 2, None, "7 fields"),
    "unclosed quote": ({"picks.csv": f'{H}\n"S1,R1,P,0.01,0.001,5,0,0\n'}, "picks.csv", 2, None,
                       "cannot split"),
    "not UTF-8": ({"picks.csv": f"{H}\n{ROW}\n".encode() + b"S\xff1,R2,P,0.01,0.001,5,0,0\n"}, "picks.csv",
                  3, None, "UTF-8"),
    "NaN time": ({"picks.csv": f"{H}\nS1,R1,P,nan,0.001,5,0,0\n"}, "picks.csv", 2, "time",
                 "finite number (got 'nan')"),
    "empty time": ({"picks.csv": f"{H}\nS1,R1,P,,0.001,5,0,0\n"}, "picks.csv", 2, "time", "missing"),
    "text time": ({"picks.csv": f"{H}\nS1,R1,P,1O.2,0.001,5,0,0\n"}, "picks.csv", 2, "time",
                  "must be a number (got '1O.2')"),
    "sigma zero": ({"picks.csv": f"{H}\nS1,R1,P,0.01,0,5,0,0\n"}, "picks.csv", 2, "sigma",
                   "sigma must be > 0 (got 0)"),
    "sigma negative": ({"picks.csv": f"# synthetic\n{H}\nS1,R1,P,0.01,-0.002,5,0,0\n"}, "picks.csv", 3,
                       "sigma", "sigma must be > 0 (got -0.002)"),
    "sigma inf": ({"picks.csv": f"{H}\nS1,R1,P,0.01,inf,5,0,0\n"}, "picks.csv", 2, "sigma", "finite"),
    "negative distance": ({"picks.csv": f"{H}\nS1,R1,P,0.01,0.001,-5,0,0\n"}, "picks.csv", 2, "distance",
                          ">= 0 (got -5)"),
    "negative time": ({"picks.csv": f"{H}\nS1,R1,P,-0.01,0.001,5,0,0\n"}, "picks.csv", 2, "time",
                      "before the origin time"),
    "duplicate pick": ({"picks.csv": f"{H}\n{ROW}\nS1,R1,S,0.02,0.002,5,0,0\n\n{ROW}\n"}, "picks.csv", 5,
                       None, "was already given on line 2"),
    "unknown wave": ({"picks.csv": f"{H}\nS1,R1,X,0.01,0.001,5,0,0\n"}, "picks.csv", 2, "wave",
                     "P or S (got 'X')"),
    "empty wave": ({"picks.csv": f"{H}\nS1,R1,,0.01,0.001,5,0,0\n"}, "picks.csv", 2, "wave", "empty"),
    "empty source id": ({"picks.csv": f"{H}\n,R1,P,0.01,0.001,5,0,0\n"}, "picks.csv", 2, "source", "missing"),
    "unknown branch": ({"picks.csv": f"{H},branch\n{ROW},refracted\n"}, "picks.csv", 2, "branch",
                       "unknown branch 'refracted'"),
    "head without interface": ({"picks.csv": f"{H},branch,interface\n{ROW},head,\n"}, "picks.csv", 2,
                               "interface", "needs an interface number"),
    "head, no interface column": ({"picks.csv": f"{H},branch\n{ROW},head\n"}, "picks.csv", 2, "branch",
                                  "no 'interface' column"),
    "interface on a first arrival": ({"picks.csv": f"{H},branch,interface\n{ROW},,1\n"}, "picks.csv", 2,
                                     "interface", "must be empty for branch 'first'"),
    "interface zero": ({"picks.csv": f"{H},branch,interface\n{ROW},reflection,0\n"}, "picks.csv", 2,
                       "interface", "whole number >= 1 (got '0')"),
    "interface fraction": ({"picks.csv": f"{H},branch,interface\n{ROW},head,1.5\n"}, "picks.csv", 2,
                           "interface", "(got '1.5')"),
    "source moves": ({"picks.csv": f"{H}\n{ROW}\nS1,R2,P,0.02,0.001,10,2,0\n"}, "picks.csv", 3,
                     "source_depth", "0 on line 2"),
    "pair distance differs": ({"picks.csv": f"{H}\n{ROW}\nS1,R1,S,0.02,0.001,6,0,0\n"}, "picks.csv", 3,
                              "distance", "5 on line 2"),
    "partial inline geometry": ({"picks.csv": H.replace(",receiver_depth", "") + "\nS1,R1,P,0.01,0.001,5,0\n"},
                                "picks.csv", 1, "receiver_depth", "inline geometry needs all"),
    "no geometry": ({"picks.csv": TABLE_PICKS}, "picks.csv", 1, None, "no geometry"),
    "geometry twice": ({"picks.csv": f"{H}\n{ROW}\n", "sources.csv": SOURCES, "receivers.csv": RECEIVERS},
                       "picks.csv", 1, "distance", "given twice"),
    "source not in table": ({"picks.csv": TABLE_PICKS + "S9,R1,P,0.01,0.001\n", "sources.csv": SOURCES,
                             "receivers.csv": RECEIVERS}, "picks.csv", 3, "source",
                            "source 'S9' is not in the sources table"),
    "receiver not in table": ({"picks.csv": "# synthetic\n" + TABLE_PICKS + "S1,R9,P,0.01,0.001\n",
                               "sources.csv": SOURCES, "receivers.csv": RECEIVERS}, "picks.csv", 4,
                              "receiver", "receiver 'R9' is not in the receivers table"),
    "time before origin time": ({"picks.csv": TABLE_PICKS.replace("0.01,", "4.0,"),
                                 "sources.csv": "source,x,y,depth,origin_time\nS1,0,0,0,5.0\n",
                                 "receivers.csv": RECEIVERS}, "picks.csv", 2, "time", "before the origin time"),
    "sources file empty": ({"picks.csv": TABLE_PICKS, "sources.csv": "", "receivers.csv": RECEIVERS},
                           "sources.csv", None, None, "empty"),
    "source listed twice": ({"picks.csv": TABLE_PICKS, "sources.csv": SOURCES + "# again\nS1,1,0,0\n",
                             "receivers.csv": RECEIVERS}, "sources.csv", 4, "source", "also on line 2"),
    "source table unknown column": ({"picks.csv": TABLE_PICKS, "sources.csv": "source,x,y,depth,magnitude\n"
                                     "S1,0,0,0,2.1\n", "receivers.csv": RECEIVERS}, "sources.csv", 1,
                                    "magnitude", "allowed columns in a sources file"),
    "depth and elevation": ({"picks.csv": TABLE_PICKS, "sources.csv": SOURCES,
                             "receivers.csv": "receiver,x,y,depth,elevation\nR1,3,4,0,0\n"}, "receivers.csv", 1,
                            "elevation", "not both"),
    "neither depth nor elevation": ({"picks.csv": TABLE_PICKS, "sources.csv": SOURCES,
                                     "receivers.csv": "receiver,x,y\nR1,3,4\n"}, "receivers.csv", 1, "depth",
                                    "'depth' or 'elevation'"),
    "half an epicentre": ({"picks.csv": TABLE_PICKS, "sources.csv": "source,x,y,depth\nS1,5,,3\n",
                           "receivers.csv": RECEIVERS}, "sources.csv", 2, "y", "both x and y"),
    "receiver depth empty": ({"picks.csv": TABLE_PICKS, "sources.csv": SOURCES,
                              "receivers.csv": "receiver,x,y,depth\nR1,3,4,\n"}, "receivers.csv", 2, "depth",
                             "missing"),
    "receiver elevation text": ({"picks.csv": TABLE_PICKS, "sources.csv": SOURCES,
                                 "receivers.csv": "receiver,x,y,elevation\nR1,3,4,12 m\n"}, "receivers.csv",
                                2, "elevation", "(got '12 m')"),
}


@pytest.mark.parametrize("case", list(ERRORS), ids=list(ERRORS))
def test_every_error_names_file_line_and_column(tmp_path, case):
    files, name, line, column, fragment = ERRORS[case]
    with pytest.raises(DataError) as info:
        _read(str(tmp_path), files)
    err = info.value
    assert os.path.basename(err.path) == name
    assert (err.line, err.column) == (line, column)
    where = err.path + (f", line {line}" if line is not None else "")
    where += f", column '{column}'" if column is not None else ""
    assert str(err).startswith(where + ": ")
    assert fragment in str(err)


def test_message_reads_as_documented(tmp_path):
    files = {"picks.csv": "# synthetic\n" * 15 + f"{H}\nS1,R1,P,0.01,-0.002,5,0,0\n"}
    with pytest.raises(DataError) as info:
        _read(str(tmp_path), files)
    assert str(info.value) == f"{tmp_path}/picks.csv, line 17, column 'sigma': sigma must be > 0 (got -0.002)"


def test_missing_sigma_explains_what_sigma_is(tmp_path):
    files = {"picks.csv": "source,receiver,wave,time,distance,source_depth,receiver_depth\nS1,R1,P,0.01,5,0,0\n"}
    with pytest.raises(DataError) as info:
        _read(str(tmp_path), files)
    message = str(info.value)
    assert "column 'sigma'" in message and "standard uncertainty" in message and "seconds" in message
    assert '[noise] scale = "free"' in message


@pytest.mark.parametrize("header, ours", [
    ("source,receiver,wave,time,sigma,offset,source_depth,receiver_depth", "distance"),
    ("source,receiver,phase,time,sigma,distance,source_depth,receiver_depth", "wave"),
    ("source,receiver,wave,tt,sigma,distance,source_depth,receiver_depth", "time"),
    ("source,receiver,wave,pick,sigma,distance,source_depth,receiver_depth", "time"),
    ("source,receiver,wave,time,unc,distance,source_depth,receiver_depth", "sigma"),
    ("source,receiver,wave,time,uncertainty,distance,source_depth,receiver_depth", "sigma"),
])
def test_column_names_of_other_programs_get_a_did_you_mean(tmp_path, header, ours):
    files = {"picks.csv": f"{header}\nS1,R1,P,0.01,0.001,5,0,0\n"}
    with pytest.raises(DataError) as info:
        _read(str(tmp_path), files)
    assert f"did you mean '{ours}'" in str(info.value)


def test_one_geometry_table_alone_is_refused(tmp_path):
    paths = _write(str(tmp_path), {"picks.csv": TABLE_PICKS, "sources.csv": SOURCES})
    with pytest.raises(ValueError, match="both sources_path and receivers_path"):
        read_picks(paths["picks.csv"], paths["sources.csv"])


# ---------------------------------------------------------------------------
# Reading what is valid
# ---------------------------------------------------------------------------

def test_inline_columns_in_any_order_and_case(tmp_path):
    text = ("# synthetic: two hammer shots, one geophone line\n"
            "\n"
            "Sigma,Time,WAVE,receiver,source,receiver_depth,distance,source_depth,branch,interface\n"
            "0.001,0.0125,p,G1,A,0,5,0,,\n"
            "  # a comment between rows\n"
            "0.002,0.031,S,G1,A,0,5,0,direct,\n"
            "0.001,0.0252,P,G2,A,-1.5,10,0,Reflection,2\n")
    picks = _read(str(tmp_path), {"picks.csv": text})
    assert picks.n_picks == 3 and picks.geometry == "inline"
    assert picks.line_numbers.tolist() == [4, 6, 7]
    assert picks.wave.tolist() == ["P", "S", "P"]
    assert picks.branch.tolist() == ["first", "direct", "reflection"]
    assert picks.interface.tolist() == [0, 0, 2]
    assert picks.time.tolist() == [0.0125, 0.031, 0.0252]
    assert picks.sigma.tolist() == [0.001, 0.002, 0.001]
    assert picks.distance.tolist() == [5.0, 5.0, 10.0]
    assert picks.receiver_depth.tolist() == [0.0, 0.0, -1.5]  # G2 stands 1.5 above the datum
    assert picks.source_names.tolist() == ["A"] and picks.receiver_names.tolist() == ["G1", "G2"]
    assert picks.receiver_index.tolist() == [0, 0, 1] and picks.source_index.tolist() == [0, 0, 0]
    assert picks.receiver_z.tolist() == [0.0, -1.5]
    assert picks.source_origin_time.tolist() == [0.0] and picks.depth_known.all()
    with pytest.raises(ValueError):
        picks.time[0] = 1.0  # read-only


def test_spreadsheet_export_with_bom_and_crlf(tmp_path):
    text = "\ufeff# synthetic\r\n" + H + "\r\n" + ROW + "\r\n\r\nS1,R2,P,0.02,0.001,10,0,0\r\n"
    picks = _read(str(tmp_path), {"picks.csv": text})
    assert picks.line_numbers.tolist() == [3, 5] and picks.source_names.tolist() == ["S1"]


def test_geometry_from_tables_with_elevations(tmp_path):
    sources = "source,x,y,depth\nA,1,1,2\nB,1,1,0\n"
    # R2 stands 2.5 above the datum, R3 0.5 below it
    receivers = "receiver,x,y,elevation\nR1,4,5,0\nR2,7,9,2.5\nR3,1,1,-0.5\n"
    picks_text = ("source,receiver,wave,time,sigma\nA,R1,P,0.01,0.001\nA,R2,P,0.02,0.001\n"
                  "B,R3,P,0.001,0.001\n")
    paths = _write(str(tmp_path), {"picks.csv": picks_text, "sources.csv": sources, "receivers.csv": receivers})
    picks = read_picks(paths["picks.csv"], paths["sources.csv"], paths["receivers.csv"])
    # horizontal distances: 3-4-5 and 6-8-10 right triangles (Pythagoras), and 0
    assert picks.distance.tolist() == [5.0, 10.0, 0.0]
    assert picks.source_depth.tolist() == [2.0, 2.0, 0.0]
    assert picks.receiver_depth.tolist() == [0.0, -2.5, 0.5]  # depth = -elevation
    assert picks.receiver_x.tolist() == [4.0, 7.0, 1.0] and picks.receiver_y.tolist() == [5.0, 9.0, 1.0]
    assert picks.source_origin_time.tolist() == [0.0, 0.0]  # no origin_time column: times are travel times
    shifted = read_picks(paths["picks.csv"], paths["sources.csv"], paths["receivers.csv"], datum_elevation=10.0)
    assert shifted.receiver_depth.tolist() == [10.0, 7.5, 10.5]  # depth = datum elevation - elevation
    assert shifted.source_depth.tolist() == [2.0, 2.0, 0.0]  # a depth column is already below the datum


def test_unknown_source_positions_and_times_are_flagged(tmp_path):
    sources = "source,x,y,depth,origin_time\nE1,2,0,,\nE2,,,6.5,\nE3,0,0,4,12.5\nE4,5,5,5,\n"
    receivers = "receiver,x,y,elevation\nN1,0,0,0.3\nN2,10,0,0.1\n"
    picks_text = ("source,receiver,wave,time,sigma\nE1,N1,P,30.1,0.02\nE2,N2,S,44.0,0.05\nE3,N2,P,14.4,0.02\n")
    picks = _read(str(tmp_path), {"picks.csv": picks_text, "sources.csv": sources, "receivers.csv": receivers})
    assert picks.source_names.tolist() == ["E1", "E2", "E3"]
    assert picks.depth_known.tolist() == [False, True, True]
    assert picks.epicentre_known.tolist() == [True, False, True]
    assert picks.origin_time_known.tolist() == [False, False, True]
    assert picks.unknown_depth_sources == ["E1"]
    assert picks.unknown_epicentre_sources == ["E2"]
    assert picks.unknown_origin_sources == ["E1", "E2"]
    assert np.isnan(picks.source_depth[0]) and picks.source_depth[1] == 6.5
    assert picks.distance[0] == 2.0 and np.isnan(picks.distance[1]) and picks.distance[2] == 10.0
    assert np.isnan(picks.travel_time[:2]).all() and picks.travel_time[2] == pytest.approx(14.4 - 12.5)
    text = picks.describe()
    assert "1 source(s) with unknown depth (E1)" in text
    assert "unknown epicentre (E2)" in text and "prior" in text
    assert "'E4' (line 5)" in text  # in the table but without picks: said, not dropped silently


def test_example_files_of_each_survey_kind():
    line = read_picks(*(os.path.join(DATA, f"line_{k}.csv") for k in ("picks", "sources", "receivers")))
    # 3 shots x 12 geophones not at the shot + 2 reflection picks (see the file's comments)
    assert (line.n_picks, line.n_sources, line.n_receivers) == (38, 3, 13)
    assert line.branch.tolist().count("reflection") == 2 and set(line.interface) == {0, 1}
    # the reflection at 20 m: t = sqrt(x^2 + (2h)^2) / v1 with h = 6 m, v1 = 600 m/s (common practice)
    k = np.flatnonzero((line.branch == "reflection") & (line.receiver_id == "G03"))[0]
    assert line.time[k] == pytest.approx(math.hypot(20.0, 12.0) / 600.0, abs=5e-5)
    hole = read_picks(os.path.join(DATA, "borehole_picks.csv"))
    assert (hole.n_picks, hole.n_sources, hole.n_receivers) == (16, 1, 8)
    assert hole.receiver_z.tolist() == [5.0 * i for i in range(1, 9)]
    quake = read_picks(*(os.path.join(DATA, f"quake_{k}.csv") for k in ("picks", "sources", "receivers")))
    assert (quake.n_picks, quake.n_sources, quake.n_receivers) == (24, 2, 6)
    assert quake.unknown_depth_sources == ["EV01", "EV02"] and quake.unknown_epicentre_sources == ["EV02"]
    assert quake.receiver_z[0] == -0.42  # NA1 at elevation 0.42 km above sea level


def test_subset_renumbers_sources_and_receivers():
    line = read_picks(*(os.path.join(DATA, f"line_{k}.csv") for k in ("picks", "sources", "receivers")))
    part = line.subset(line.source_id == "SP-B")
    assert part.n_picks == 12 and part.source_names.tolist() == ["SP-B"]
    assert part.source_index.tolist() == [0] * 12
    assert "G13" not in part.receiver_names  # SP-B stands at G13 and has no pick there
    assert part.receiver_names[part.receiver_index].tolist() == part.receiver_id.tolist()
    with pytest.raises(ValueError, match="boolean"):
        line.subset(np.arange(3))


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------

ids = st.text(alphabet="AB1 ,\"'#-", min_size=1, max_size=4).filter(lambda s: s == s.strip())
finite = st.floats(min_value=1e-6, max_value=1e4, allow_nan=False)


@settings(max_examples=25, deadline=None)
@given(rows=st.lists(st.tuples(ids, ids, st.sampled_from(["P", "S"]), st.sampled_from(
    [("first", 0), ("direct", 0), ("head", 1), ("reflection", 3)]), finite, finite), min_size=1, max_size=6,
    unique_by=lambda r: (r[0], r[1], r[2], r[3])))
def test_write_then_read_gives_the_same_values(rows):
    sources = sorted({r[0] for r in rows})
    receivers = sorted({r[1] for r in rows})
    # one depth per source and receiver, one distance per pair, as inline geometry requires
    zs = {s: float(i) for i, s in enumerate(sources)}
    zr = {r: -0.5 * i for i, r in enumerate(receivers)}
    columns = {"source": [r[0] for r in rows], "receiver": [r[1] for r in rows], "wave": [r[2] for r in rows],
               "branch": [r[3][0] for r in rows], "interface": [r[3][1] for r in rows],
               "time": [r[4] for r in rows], "sigma": [r[5] for r in rows],
               "distance": [len(r[0]) + 0.1 * len(r[1]) + 1 / 3 for r in rows],
               "source_depth": [zs[r[0]] for r in rows], "receiver_depth": [zr[r[1]] for r in rows]}
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "synthetic.csv")
        write_picks(path, columns, comment="synthetic picks for a round-trip test")
        picks = read_picks(path)
        assert os.listdir(folder) == ["synthetic.csv"]
    for name in ("source", "receiver", "wave", "branch"):
        assert getattr(picks, name + ("_id" if name in ("source", "receiver") else "")).tolist() == columns[name]
    for name in ("interface", "time", "sigma", "distance", "source_depth", "receiver_depth"):
        assert getattr(picks, name).tolist() == columns[name]  # exact: floats written at full precision


def test_tables_round_trip_keeps_unknowns(tmp_path):
    quake = read_picks(*(os.path.join(DATA, f"quake_{k}.csv") for k in ("picks", "sources", "receivers")))
    out = {k: str(tmp_path / f"{k}.csv") for k in ("picks", "sources", "receivers")}
    write_picks(out["picks"], quake, sources_path=out["sources"], receivers_path=out["receivers"])
    back = read_picks(out["picks"], out["sources"], out["receivers"])
    for name in ("source_id", "receiver_id", "wave", "branch", "interface", "source_names", "receiver_names",
                 "depth_known", "epicentre_known"):
        assert getattr(back, name).tolist() == getattr(quake, name).tolist()
    for name in ("time", "sigma", "distance", "source_depth", "receiver_depth", "source_origin_time",
                 "receiver_z", "source_x"):
        np.testing.assert_array_equal(getattr(back, name), getattr(quake, name))
    with pytest.raises(ValueError, match="unknown source position"):
        write_picks(str(tmp_path / "inline.csv"), quake)  # inline layout cannot hold unknown sources
    timed = _read(str(tmp_path), {"picks.csv": TABLE_PICKS.replace("0.01,", "5.01,"), "receivers.csv": RECEIVERS,
                                  "sources.csv": "source,x,y,depth,origin_time\nS1,0,0,0,5.0\n"})
    with pytest.raises(ValueError, match="origin time"):
        write_picks(str(tmp_path / "inline.csv"), timed)  # inline times are travel times: origin time 0
    assert not (tmp_path / "inline.csv").exists()


def test_invalid_columns_are_not_written(tmp_path):
    target = tmp_path / "picks.csv"
    target.write_text("# an earlier file that must survive\n")
    columns = {"source": ["A", "A"], "receiver": ["G1", "G2"], "wave": ["P", "P"], "time": [0.01, 0.02],
               "sigma": [0.001, -0.001], "distance": [5.0, 10.0], "source_depth": [0.0, 0.0],
               "receiver_depth": [0.0, 0.0]}
    with pytest.raises(DataError) as info:
        write_picks(target, columns)
    assert (info.value.line, info.value.column) == (3, "sigma")
    assert target.read_text() == "# an earlier file that must survive\n"
    assert sorted(os.listdir(tmp_path)) == ["picks.csv"]  # no temporary file left behind
    with pytest.raises(ValueError, match="unknown column"):
        write_picks(target, {**columns, "quality": [1, 2]})
    with pytest.raises(ValueError, match="surrounding blanks"):
        write_picks(target, {**columns, "sigma": [0.001, 0.001], "source": [" A", " A"]})


# ---------------------------------------------------------------------------
# Reciprocity and the 1-D check
# ---------------------------------------------------------------------------

LINE_RECEIVERS = "receiver,x,y,depth\n" + "".join(f"G{i:02d},{10 * i},0,0\n" for i in range(13))
LINE_SOURCES = "source,x,y,depth\nA,0,0,0\nB,120,0,0\n"


def _line(tmp_path, picks_text):
    return _read(str(tmp_path), {"picks.csv": "source,receiver,wave,time,sigma\n" + picks_text,
                                 "sources.csv": LINE_SOURCES, "receivers.csv": LINE_RECEIVERS})


def test_reciprocal_mismatch_of_40_ms_is_reported(tmp_path):
    picks = _line(tmp_path, "A,G12,P,0.0855,0.001\nB,G00,P,0.1255,0.001\nA,G06,P,0.0522,0.001\n")
    pairs = reciprocal_mismatch(picks)
    assert len(pairs) == 1  # A stands at G00 and B at G12: one reversed pair
    pair = pairs[0]
    assert (pair.line_a, pair.line_b) == (2, 3)
    assert pair.difference == pytest.approx(-0.040)
    assert pair.sigma == pytest.approx(math.sqrt(2) * 0.001)
    message = reciprocity_message(pairs)
    assert "1 of 1 reversed pair(s) differ by more than 3 combined sigma" in message
    assert "line 2 (A -> G12) vs line 3 (B -> G00)" in message


def test_consistent_reciprocal_pair_is_not_reported(tmp_path):
    pairs = reciprocal_mismatch(_line(tmp_path, "A,G12,P,0.0855,0.001\nB,G00,P,0.0857,0.001\n"))
    assert len(pairs) == 1 and pairs[0].misfit < 3
    assert reciprocity_message(pairs).startswith("Reciprocity: all 1 reversed pair(s) agree")


def test_reciprocal_pairs_need_same_wave_branch_and_place(tmp_path):
    # S against P, and shot B moved 5 m off the geophone G12: no reversed pair
    assert reciprocal_mismatch(_line(tmp_path, "A,G12,P,0.0855,0.001\nB,G00,S,0.2,0.002\n")) == []
    moved = _read(str(tmp_path), {"picks.csv": "source,receiver,wave,time,sigma\nA,G12,P,0.0855,0.001\n"
                                  "B,G00,P,0.1255,0.001\n", "sources.csv": "source,x,y,depth\nA,0,0,0\nB,125,0,0\n",
                                  "receivers.csv": LINE_RECEIVERS})
    assert reciprocal_mismatch(moved) == []
    assert len(reciprocal_mismatch(moved, tolerance=6.0)) == 1
    assert "no reversed pairs" in reciprocity_message([])


def test_repeated_shot_is_one_place(tmp_path):
    sources = LINE_SOURCES + "A2,0,0,0\n"  # a second hammer shot on the same plate as A
    picks = _read(str(tmp_path), {"picks.csv": "source,receiver,wave,time,sigma\nA,G05,P,0.0411,0.001\n"
                                  "A2,G05,P,0.0500,0.001\nA2,G12,P,0.0855,0.001\nB,G00,P,0.0855,0.001\n",
                                  "sources.csv": sources, "receivers.csv": LINE_RECEIVERS})
    assert offset_mismatch(picks) == []  # A and A2 -> G05 is a repeat, not a comparison between places
    assert [(p.line_a, p.line_b) for p in reciprocal_mismatch(picks)] == [(4, 5)]


def test_inline_reciprocity_matches_identical_ids(tmp_path):
    text = (f"{H}\nG01,G24,P,0.0855,0.001,115,0,0\nG24,G01,P,0.1255,0.001,115,0,0\n"
            "G01,G12,P,0.05,0.001,55,0,0\n")
    pairs = reciprocal_mismatch(_read(str(tmp_path), {"picks.csv": text}))
    assert [(p.line_a, p.line_b) for p in pairs] == [(2, 3)]
    assert pairs[0].misfit > 3


def _dipping_refractor_picks(dip_deg):
    """Head-wave times of a reversed profile over a dipping refractor.

    Kearey, Brooks & Hill, An Introduction to Geophysical Exploration, 3rd ed., 2002,
    ch. 5, dipping-layer travel times (from memory): shooting down-dip from A,
    t = x sin(ic + a) / v1 + 2 hA cos(ic) / v1; up-dip from B, t = x sin(ic - a) / v1
    + 2 hB cos(ic) / v1, with hA, hB the perpendicular depths under the shots.
    """
    v1, v2, h_a, length = 500.0, 1500.0, 8.0, 100.0
    a, ic = math.radians(dip_deg), math.asin(v1 / v2)
    h_b = h_a + length * math.sin(a)
    rows = []
    for k in range(3, 11):  # offsets 30..100 m, beyond the critical distance
        x = 10.0 * k
        rows.append(f"A,G{k:02d},P,head,1,{x * math.sin(ic + a) / v1 + 2 * h_a * math.cos(ic) / v1!r},0.001\n")
        rows.append(f"B,G{10 - k:02d},P,head,1,{x * math.sin(ic - a) / v1 + 2 * h_b * math.cos(ic) / v1!r},0.001\n")
    receivers = "receiver,x,y,depth\n" + "".join(f"G{i:02d},{10 * i},0,0\n" for i in range(11))
    return {"picks.csv": "source,receiver,wave,branch,interface,time,sigma\n" + "".join(rows),
            "sources.csv": "source,x,y,depth\nA,0,0,0\nB,100,0,0\n", "receivers.csv": receivers}


def test_dipping_refractor_fails_the_1d_check_but_not_reciprocity(tmp_path):
    picks = _read(str(tmp_path), _dipping_refractor_picks(4.0))
    reversed_pairs = reciprocal_mismatch(picks)
    assert len(reversed_pairs) == 1 and abs(reversed_pairs[0].difference) < 1e-12  # reciprocity holds
    assert "agree" in reciprocity_message(reversed_pairs)
    pairs = offset_mismatch(picks)
    assert len(pairs) == 7  # offsets 30..90 m from both ends (100 m is the reversed pair itself)
    # difference at offset x: 2 sin(a) cos(ic) (x - L) / v1 from the formulas above: 18.4 ms at 30 m
    worst = max(pairs, key=lambda p: p.misfit)
    assert abs(worst.difference) == pytest.approx(2 * math.sin(math.radians(4)) * math.sqrt(8 / 9) * 70 / 500)
    message = offset_message(pairs)
    assert "not 1-D" in message and "biased" in message


def test_flat_refractor_passes_the_1d_check(tmp_path):
    pairs = offset_mismatch(_read(str(tmp_path), _dipping_refractor_picks(0.0)))
    assert len(pairs) == 7 and max(p.misfit for p in pairs) < 1e-6
    assert "consistent with a 1-D structure" in offset_message(pairs)


def _pairs_with_misfits(misfits):
    """Same-offset pairs (invented routes) whose normalised differences are ``misfits``."""
    from invert.data import PickPair

    return [PickPair(2 * k, 2 * k + 1, 2 * k + 2, 2 * k + 3, f"A -> g{k}", f"B -> h{k}", "P first",
                     0.1 + 0.001 * m, 0.1, 0.001) for k, m in enumerate(misfits)]


@pytest.mark.parametrize("n", [2, 3, 4, 7, 20])
def test_same_offset_verdict_follows_the_binomial_tail(n):
    # One pair beyond 3 sigma among n. Under Gaussian errors a pair exceeds 3 sigma with
    # q = erfc(3 / sqrt 2) = 0.0026998 (normal tail; Abramowitz & Stegun, Handbook of
    # Mathematical Functions, 1964, ch. 26, from memory), so P(at least one of n) = 1 - (1 - q)^n
    # (binomial distribution; common practice): 0.0081 for n = 3, 0.0108 for n = 4. The
    # structure is called not 1-D only below 1 %.
    q = math.erfc(3.0 / math.sqrt(2.0))
    message = offset_message(_pairs_with_misfits([3.5] + [0.5] * (n - 1)))
    chance = 1.0 - (1.0 - q) ** n
    assert f"probability {chance:.2g}" in message
    if chance < 0.01:
        assert "not 1-D" in message and "more than chance allows" in message
    else:
        assert "not 1-D" not in message and "consistent with a 1-D structure" in message


def test_same_offset_two_pairs_beyond_chance_are_not_1d():
    # two of 7 beyond 3 sigma: P = 1 - (1-q)^7 - 7 q (1-q)^6 = 1.4e-4 (binomial; common practice)
    q = math.erfc(3.0 / math.sqrt(2.0))
    chance = 1.0 - (1.0 - q) ** 7 - 7 * q * (1.0 - q) ** 6
    message = offset_message(_pairs_with_misfits([3.5, 4.0] + [0.5] * 5))
    assert f"probability {chance:.2g}" in message and "not 1-D" in message
