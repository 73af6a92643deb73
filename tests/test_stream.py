"""Streaming collapse (bayesdid.stream): a CSV file, a Parquet folder or glob give the in-memory cells;
the Dask path gives the local stream's cells bit for bit; bad folders are refused before any work."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.cli import main
from bayesdid.errors import DataRoleError
from bayesdid.run import prepare
from bayesdid.simulate import Scenario, simulate
from bayesdid.stream import collapse_stream

ARRAYS = ("n", "sum_y", "sum_y2", "ss")


@pytest.fixture(scope="module")
def parts(tmp_path_factory):
    sc = Scenario(jurisdictions=12, periods=6, groups=2, starts={0: 3, 1: 4}, rows_per_cell=40)
    frame, truth = simulate(sc, 5)
    frame["y"] = np.exp(frame["y"] / 2)  # positive, for the log-outcome case
    d = tmp_path_factory.mktemp("stream")
    shuffled = frame.sample(frac=1, random_state=3).reset_index(drop=True)
    (d / "parts").mkdir()
    k = len(shuffled) // 5
    for i in range(5):  # parts of unequal content: labels first seen in different files
        part = shuffled.iloc[i * k : (i + 1) * k if i < 4 else len(shuffled)]
        pq.write_table(
            pa.Table.from_pandas(part, preserve_index=False), d / "parts" / f"part-{i}.parquet", row_group_size=97
        )
    frame.to_csv(d / "all.csv", index=False)
    return d, frame, truth


def _study(table, truth, **kw):
    return make_study(
        table=table,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        **kw,
    )


@pytest.mark.parametrize("log", [False, True])
@pytest.mark.parametrize("where", ["parts", "parts/*.parquet", "all.csv"])
def test_stream_equals_in_memory(parts, where, log):
    d, frame, truth = parts
    ref = collapse(_study(d / "all.csv", truth, log_outcome=log), frame)
    cells, digest = collapse_stream(_study(str(d / where), truth, log_outcome=log))
    assert digest.startswith("listing:")
    assert (cells.jurisdictions, cells.groups, cells.periods) == (ref.jurisdictions, ref.groups, ref.periods)
    assert cells.rows == ref.rows == len(frame)
    assert cells.log_outcome == log
    np.testing.assert_array_equal(cells.start, ref.start)
    for name in ARRAYS:
        np.testing.assert_allclose(getattr(cells, name), getattr(ref, name), rtol=1e-11, atol=1e-9, err_msg=name)
    assert cells.outcome_sd == pytest.approx(ref.outcome_sd, rel=1e-12)


def test_folder_table_streams_through_prepare(parts):
    d, frame, truth = parts
    cells, digest, _ = prepare(_study(str(d / "parts"), truth))
    ref = collapse(_study(d / "all.csv", truth), frame)
    np.testing.assert_allclose(cells.sum_y, ref.sum_y, rtol=1e-11, atol=1e-9)


@pytest.mark.slow
def test_dask_local_cluster_is_bit_equal_to_local_stream(parts):
    d, _, truth = parts
    st = _study(str(d / "parts"), truth)
    a, _ = collapse_stream(st)
    b, _ = collapse_stream(st, cluster="local")
    for name in ARRAYS:
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)


def test_parquet_files_disagreeing_on_types_refused(parts, tmp_path):
    d, frame, truth = parts
    (tmp_path / "p").mkdir()
    pq.write_table(pa.Table.from_pandas(frame.iloc[:500], preserve_index=False), tmp_path / "p" / "a.parquet")
    other = frame.iloc[500:].assign(period=frame["period"].iloc[500:].astype(str))
    pq.write_table(pa.Table.from_pandas(other, preserve_index=False), tmp_path / "p" / "b.parquet")
    with pytest.raises(
        DataRoleError,
        match=r"files of the table disagree on the type of column 'period': int64 in "
        r"'.*a.parquet' but string in '.*b.parquet'",
    ):
        collapse_stream(_study(str(tmp_path / "p"), truth))


def test_parquet_files_disagreeing_on_columns_refused(parts, tmp_path):
    d, frame, truth = parts
    (tmp_path / "p").mkdir()
    pq.write_table(pa.Table.from_pandas(frame.iloc[:500], preserve_index=False), tmp_path / "p" / "a.parquet")
    pq.write_table(
        pa.Table.from_pandas(frame.iloc[500:].rename(columns={"y": "spend"}), preserve_index=False),
        tmp_path / "p" / "b.parquet",
    )
    with pytest.raises(DataRoleError, match=r"file '.*b.parquet' of the table lacks column\(s\) \['y'\]"):
        collapse_stream(_study(str(tmp_path / "p"), truth))


def test_stream_refuses_shapes_it_cannot_carry(parts):
    d, _, truth = parts
    st = make_study(
        table=str(d / "parts"),
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        covariates="period",
    )
    with pytest.raises(
        DataRoleError,
        match="streaming collapse takes observation rows without covariates, "
        "weights or units .* this study has covariates",
    ):
        collapse_stream(st)


@pytest.mark.parametrize("family", ["binomial", "binomial_trials", "poisson"])
def test_stream_families_equal_in_memory(parts, tmp_path, family):
    d, frame, truth = parts
    rng = np.random.default_rng(4)
    f = frame.copy()
    kw = {}
    if family == "binomial":
        f["y"] = (rng.random(len(f)) < 0.3).astype(float)
    elif family == "binomial_trials":
        f["k"] = rng.integers(1, 9, len(f)).astype(float)
        f["y"] = rng.binomial(f["k"].astype(int), 0.4).astype(float)
        kw["trials"] = "k"
    else:
        f["t"] = rng.uniform(0.5, 2.0, len(f))
        f["y"] = rng.poisson(1.5 * f["t"]).astype(float)
        kw["exposure"] = "t"
    (tmp_path / "p").mkdir()
    half = len(f) // 2
    for i, part in enumerate((f.iloc[:half], f.iloc[half:])):
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), tmp_path / "p" / f"{i}.parquet")
    fam = family.split("_")[0]
    ref = collapse(_study(tmp_path / "x.csv", truth, family=fam, **kw), f)
    cells, _ = collapse_stream(_study(str(tmp_path / "p"), truth, family=fam, **kw))
    assert cells.rows == ref.rows
    np.testing.assert_array_equal(cells.sum_y, ref.sum_y)
    np.testing.assert_allclose(cells.n, ref.n, rtol=1e-13)
    for key in ("cell", "y"):
        np.testing.assert_array_equal(cells.extra["records"][key], ref.extra["records"][key])
    np.testing.assert_allclose(cells.extra["records"]["size"], ref.extra["records"]["size"], rtol=1e-13)
    assert cells.outcome_mean == pytest.approx(ref.outcome_mean, rel=1e-13)


def test_cli_bad_folder_exit_2_nothing_written(parts, tmp_path, capsys):
    d, frame, truth = parts
    (tmp_path / "p").mkdir()
    pq.write_table(pa.Table.from_pandas(frame.iloc[:500], preserve_index=False), tmp_path / "p" / "a.parquet")
    pq.write_table(
        pa.Table.from_pandas(frame.iloc[500:].assign(y=frame["y"].iloc[500:].astype(str)), preserve_index=False),
        tmp_path / "p" / "b.parquet",
    )
    study = tmp_path / "study.toml"
    study.write_text(
        f'[data]\ntable = "p"\noutcome = "y"\njurisdiction = "region"\nperiod = "period"\n'
        f'group = "group"\n[policy]\ntarget_group = "target"\nadopters = {json.dumps(truth["starts"])}\n'.replace(
            '{"', '{ "'
        ).replace('": ', '" = ')
    )
    out = tmp_path / "run"
    assert main(["fit", str(study), "--out", str(out), "--quiet"]) == 2
    assert "disagree on the type of column 'y'" in capsys.readouterr().err
    assert not out.exists()


def test_stream_refuses_a_binomial_outcome_that_is_not_0_or_1(parts, tmp_path):
    d, frame, truth = parts
    (tmp_path / "p").mkdir()
    f = frame.assign(y=(frame["y"] > 1.5).astype(float))
    f.loc[f.index[-1], "y"] = 2.0
    pq.write_table(pa.Table.from_pandas(f, preserve_index=False), tmp_path / "p" / "0.parquet")
    with pytest.raises(DataRoleError, match=r"outcome column 'y' must be 0 or 1 for family 'binomial' .*rows 1-"):
        collapse_stream(_study(str(tmp_path / "p"), truth, family="binomial"))
