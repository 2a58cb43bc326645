"""``choicecast demo``: the invented models cover what the design asks of a demo, and seeding
twice changes nothing."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

from model_store import open_store
from model_store.demo import VERSIONS, demo_coefficients


def test_demo_models_have_what_a_rollout_trial_needs():
    families = {d.spec["family"] for d in VERSIONS}
    assert {"binary", "multinomial", "nested"} <= families
    specs = [d.spec for d in VERSIONS]
    assert any(a.get("outside") for s in specs for a in s["alternatives"])
    terms = [t for s in specs for ts in s["utilities"].values() for t in ts]
    assert any(t.get("transform") == "log" for t in terms)
    assert any(t.get("context") and t.get("attribute") for t in terms)  # context interaction
    for demo in VERSIONS:
        coefficients = demo_coefficients(demo)
        cov = coefficients.covariance
        # positive semi-definite: every eigenvalue >= 0 (numpy's symmetric eigensolver)
        assert np.linalg.eigvalsh(cov).min() >= -1e-12
        np.testing.assert_allclose(np.sqrt(np.diag(cov)), coefficients.std_errors)
        cost = next(v["name"] for v in demo.spec["attributes"] if v.get("role") == "cost")
        cost_coefs = {
            t["coefficient"]
            for ts in demo.spec["utilities"].values()
            for t in ts
            if t.get("attribute") == cost and not t.get("context")
        }
        assert all(demo.estimates[c] < 0 for c in cost_coefs)  # paying more never attracts
        for nest in demo.spec.get("nests", []):
            assert 0 < demo.estimates[nest["scale"]] <= 1


def test_demo_seeds_once_and_is_idempotent(cli, tmp_path: Path):
    populations = tmp_path / "populations"
    first = cli("demo", "--populations", str(populations))
    assert first.code == 0, first.err
    assert "published" in first.out
    listing = cli("list", "--json").json()
    assert {m["model"] for m in listing} == {d.model for d in VERSIONS}
    commute = next(m for m in listing if m["model"] == "wrenmouth_commute")
    assert commute["live"] == "v1 90%, v2 10%"
    files = sorted(populations.glob("*.parquet"))
    assert len(files) == len({d.model for d in VERSIONS})
    before = {f: f.read_bytes() for f in files}

    again = cli("demo", "--populations", str(populations))
    assert again.code == 0, again.err
    assert "published" not in again.out.replace("already published", "")
    assert cli("list", "--json").json() == listing
    assert {f: f.read_bytes() for f in files} == before

    for path in files:
        model = path.stem
        result = cli("compare", model, "v1", "v1", "--population", str(path), "--json")
        assert result.code == 0, result.err
        report = result.json()
        assert report["max_abs_dp"] == 0.0
        assert abs(sum(report["shares"]["v1"].values()) - 1) < 1e-12
    canary = cli(
        "compare", "wrenmouth_commute", "v1", "v2", "--population",
        str(populations / "wrenmouth_commute.parquet"),
    )  # fmt: skip
    assert canary.code == 0 and "share v2" in canary.out


def test_score_file_writes_probabilities(cli, tmp_path: Path):
    populations = tmp_path / "populations"
    cli("demo", "--populations", str(populations))
    out = tmp_path / "scored.parquet"
    result = cli(
        "score-file", "larkspur_delivery", "--population",
        str(populations / "larkspur_delivery.parquet"), "--out", str(out),
    )  # fmt: skip
    assert result.code == 0, result.err
    table = pq.read_table(out)
    p = np.column_stack([table[c].to_numpy() for c in table.column_names if c.startswith("p_")])
    np.testing.assert_allclose(p.sum(axis=1), 1.0)
    assert table.num_rows == 2000


def test_demo_store_opens_from_the_library(tmp_path: Path, capsys):
    from service.cli import main

    store_dir = tmp_path / "store"
    assert main(["demo", "--store", str(store_dir), "--populations", str(tmp_path / "p")]) == 0
    store = open_store(str(store_dir))
    for demo in VERSIONS:
        loaded = store.load_version(demo.model, demo.version)
        assert loaded.manifest["estimation"]["notes"].startswith("invented")
