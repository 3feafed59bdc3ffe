"""Scene regimes: k chosen by silhouette, train-only fit, clear scenes, row order.

References: scikit-learn (KMeans, StandardScaler, silhouette_score, adjusted_rand_score)
refitted here directly, scipy's pairwise distances for Rousseeuw's (1987) silhouette
written out, and numpy for the standardization.
"""

from __future__ import annotations

import json
import logging

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.spatial.distance import cdist
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score, silhouette_score
from sklearn.preprocessing import StandardScaler

from lesprep.errors import ConfigError, InputError
from lesprep.report import regime_figures, regimes
from lesprep.report.regime_figures import write_regime_outputs
from lesprep.report.settings import RegimeSettings
from lesprep.sets.splits import Assignment, write_assignment_tsv
from settings_helpers import workflow_settings

FOUR = ["lwp_mean", "lwp_std", "lwp_skew", "peak_wavelength_rel"]
DOMAIN = 3200.0  # m


def regime_settings(**fields) -> RegimeSettings:
    """Schema defaults, with fields replaced (through the config, as the workflow does)."""
    cfg = {}
    if "descriptors" in fields:
        cfg["descriptors"] = list(fields.pop("descriptors"))
    if "k_range" in fields:
        cfg["k_range"] = list(fields.pop("k_range"))
    cfg.update(fields)
    return workflow_settings(regimes=cfg).regimes


def scene_table(points: np.ndarray, cases: list[str], times: list[float]) -> pd.DataFrame:
    """A scene table whose four descriptors of FOUR are the columns of ``points``."""
    n = len(points)
    return pd.DataFrame(
        {
            "case": cases,
            "time_s": times,
            "lwp_mean": points[:, 0],
            "lwp_std": points[:, 1],
            "lwp_skew": points[:, 2],
            "cloud_cover": np.full(n, 0.5),
            "peak_wavelength_m": points[:, 3] * DOMAIN,
            "peak_at_domain": np.zeros(n, dtype=bool),
            "domain_m": np.full(n, DOMAIN),
        }
    )


def blobs(seed: int = 1, per_blob: int = 12) -> tuple[np.ndarray, np.ndarray]:
    """Three well separated Gaussian blobs in 4-D (spread 0.05 around centres 1 apart)."""
    rng = np.random.default_rng(seed)
    centres = np.array([[0.1, 0.02, 0.5, 0.25], [0.3, 0.06, 1.5, 0.5], [0.2, 0.1, -0.5, 1.0]])
    scale = np.array([0.005, 0.002, 0.05, 0.02])
    truth = np.repeat(np.arange(3), per_blob)
    pts = centres[truth] + rng.normal(size=(truth.size, 4)) * scale
    return pts, truth


def blob_scenes(per_blob: int = 12) -> tuple[pd.DataFrame, np.ndarray]:
    pts, truth = blobs(per_blob=per_blob)
    n = len(pts)
    cases = [f"case-{i % 6:02d}" for i in range(n)]
    times = [3600.0 * (i // 6) for i in range(n)]
    return scene_table(pts, cases, times), truth


def all_train(frame: pd.DataFrame) -> dict[str, str]:
    return dict.fromkeys(frame["case"], "train")


# ------------------------------------------------------------------ choice of k


def test_silhouette_chooses_three_blobs_and_matches_sklearn():
    frame, truth = blob_scenes()
    s = regime_settings(descriptors=FOUR, k_range=[2, 6], seed=3, n_init=5)
    table, fit = regimes.label_scenes(frame, all_train(frame), s)
    assert fit.k == 3
    assert sorted(fit.silhouette) == [2, 3, 4, 5, 6]
    # reference: sklearn's scaler (population std), KMeans and silhouette_score directly,
    # on the rows in (case, time) order (the order the fit sees, k-means++ depends on it)
    ordered = frame.assign(truth=truth).sort_values(["case", "time_s"])
    x = StandardScaler().fit_transform(
        np.column_stack(
            [
                ordered[["lwp_mean", "lwp_std", "lwp_skew"]].to_numpy(),
                ordered["peak_wavelength_m"] / ordered["domain_m"],
            ]
        )
    )
    for k, score in fit.silhouette.items():
        labels = KMeans(n_clusters=k, n_init=5, random_state=3).fit_predict(x)
        assert score == pytest.approx(silhouette_score(x, labels), rel=1e-9, abs=1e-12)
    assert max(fit.silhouette, key=fit.silhouette.get) == 3
    # every scene in the cluster of its own blob
    assert adjusted_rand_score(ordered["truth"], table["label"]) == 1.0


def test_silhouette_is_rousseeuws_mean_width():
    """s(i) = (b - a) / max(a, b), a the mean distance within its cluster, b the smallest
    mean distance to another cluster (Rousseeuw 1987), with scipy's distances."""
    frame, _ = blob_scenes()
    table, fit = regimes.label_scenes(frame, all_train(frame), regime_settings(descriptors=FOUR))
    x = fit.standardization.apply(regimes.descriptor_frame(frame, FOUR))
    labels = table["label"].to_numpy()
    d = cdist(x, x)
    widths = []
    for i in range(len(x)):
        own = labels == labels[i]
        a = d[i, own].sum() / (own.sum() - 1)
        b = min(d[i, labels == other].mean() for other in set(labels) - {labels[i]})
        widths.append((b - a) / max(a, b))
    assert fit.silhouette[fit.k] == pytest.approx(np.mean(widths), rel=1e-12)


def test_ties_go_to_the_smaller_k():
    assert regimes.choose_k({4: 0.6, 2: 0.6, 3: 0.5}) == 2
    assert regimes.choose_k({2: 0.1, 5: 0.9}) == 5


# ------------------------------------------------------------------ determinism


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.permutations(list(range(36))))
def test_labels_do_not_depend_on_row_order(order):
    frame, _ = blob_scenes()
    s = regime_settings(descriptors=FOUR, k_range=[2, 4], n_init=3)
    ref, ref_fit = regimes.label_scenes(frame, all_train(frame), s)
    shuffled = frame.iloc[list(order)].reset_index(drop=True)
    got, fit = regimes.label_scenes(shuffled, all_train(frame), s)
    key = ["case", "time_s"]
    merged = ref.merge(got, on=key, suffixes=("_ref", "_got"), validate="one_to_one")
    assert len(merged) == len(frame)
    assert (merged["label_ref"] == merged["label_got"]).all()
    assert fit.silhouette == ref_fit.silhouette
    np.testing.assert_array_equal(fit.centroids, ref_fit.centroids)


def test_labels_are_numbered_by_centroid():
    frame, _ = blob_scenes()
    _, fit = regimes.label_scenes(frame, all_train(frame), regime_settings(descriptors=FOUR))
    first = fit.centroids[:, 0]
    assert np.all(np.diff(first) > 0)  # label 0 has the smallest first descriptor


# ------------------------------------------------------------------ dropped and clear


def test_constant_descriptor_is_dropped_and_reported(caplog):
    frame, _ = blob_scenes()
    frame["lwp_skew"] = 0.75
    s = regime_settings(descriptors=FOUR, k_range=[2, 5])
    with caplog.at_level(logging.WARNING, logger="lesprep"):
        table, fit = regimes.label_scenes(frame, all_train(frame), s)
    assert fit.standardization.dropped == {"lwp_skew": 0.75}
    assert fit.standardization.names == ("lwp_mean", "lwp_std", "peak_wavelength_rel")
    assert "lwp_skew = 0.75" in caplog.text
    # the same as leaving it out of the configuration
    without = regime_settings(descriptors=[d for d in FOUR if d != "lwp_skew"], k_range=[2, 5])
    other, other_fit = regimes.label_scenes(frame, all_train(frame), without)
    assert table["label"].tolist() == other["label"].tolist()
    assert fit.silhouette == other_fit.silhouette
    assert fit.to_dict()["dropped"] == {"lwp_skew": 0.75}


def test_standardization_uses_population_statistics():
    frame, _ = blob_scenes()
    st_ = regimes.standardize(regimes.descriptor_frame(frame, FOUR), FOUR)
    values = regimes.descriptor_frame(frame, FOUR)[FOUR].to_numpy()
    np.testing.assert_allclose(st_.mean, np.mean(values, axis=0), rtol=1e-14)
    np.testing.assert_allclose(st_.std, np.std(values, axis=0, ddof=0), rtol=1e-14)


def test_clear_scenes_get_their_own_label_and_stay_out_of_the_fit():
    frame, _ = blob_scenes()
    clear = frame.iloc[:4].copy()
    clear["time_s"] += 1e6  # new times of the same cases
    clear[["lwp_mean", "lwp_std", "lwp_skew", "cloud_cover"]] = 0.0
    clear["peak_wavelength_m"] = np.nan  # a uniform field has no spectral peak
    clear.loc[clear.index[-1], "cloud_cover"] = 0.1  # cloudy, yet its peak is undefined
    both = pd.concat([frame, clear], ignore_index=True)
    s = regime_settings(descriptors=FOUR)
    table, fit = regimes.label_scenes(both, all_train(both), s)
    ref, ref_fit = regimes.label_scenes(frame, all_train(frame), s)
    is_clear = table["time_s"] >= 1e6
    assert (table.loc[is_clear, "label"] == regimes.CLEAR_LABEL).all()
    assert table.loc[is_clear, "clear"].all() and not table.loc[~is_clear, "clear"].any()
    assert fit.n_fit == len(frame)
    assert fit.silhouette == ref_fit.silhouette
    np.testing.assert_array_equal(fit.centroids, ref_fit.centroids)
    kept = table[~is_clear].reset_index(drop=True)
    assert kept["label"].tolist() == ref["label"].tolist()


# ------------------------------------------------------------------ no leakage


def test_fit_uses_only_train_scenes():
    frame, _ = blob_scenes()
    splits = {c: ("test" if c in ("case-04", "case-05") else "train") for c in frame["case"]}
    s = regime_settings(descriptors=FOUR)
    table, fit = regimes.label_scenes(frame, splits, s)
    moved = frame.copy()
    held = moved["case"].isin(["case-04", "case-05"])
    moved.loc[held, ["lwp_mean", "lwp_skew"]] *= 3.0  # test scenes change a lot
    table2, fit2 = regimes.label_scenes(moved, splits, s)
    train = table["split"] == "train"
    assert table.loc[train, "label"].tolist() == table2.loc[train, "label"].tolist()
    np.testing.assert_array_equal(fit.centroids, fit2.centroids)
    np.testing.assert_array_equal(fit.standardization.mean, fit2.standardization.mean)
    # reference: train-only StandardScaler, then the nearest centroid by scipy's distances
    d = regimes.descriptor_frame(moved, FOUR)
    is_train = d["case"].map(splits).eq("train").to_numpy()
    scaler = StandardScaler().fit(d.loc[is_train, FOUR].to_numpy())
    x_test = scaler.transform(d.loc[~is_train, FOUR].to_numpy())
    expected = np.argmin(cdist(x_test, fit2.centroids), axis=1)
    assert table2.loc[~is_train, "label"].tolist() == expected.tolist()


def test_too_few_scenes_give_one_regime(caplog):
    pts, _ = blobs(per_blob=1)
    frame = scene_table(pts[:2], ["a", "b"], [0.0, 0.0])
    with caplog.at_level(logging.WARNING, logger="lesprep"):
        table, fit = regimes.label_scenes(frame, {"a": "train", "b": "train"}, regime_settings())
    assert fit.k == 1 and fit.silhouette == {} and fit.skipped == (2, 3, 4, 5, 6)
    assert table["label"].tolist() == [0, 0]
    assert "no k in [2, 6]" in caplog.text


# ------------------------------------------------------------------ errors and settings


def test_errors_name_the_file_and_what_is_missing():
    frame, _ = blob_scenes()
    with pytest.raises(InputError, match=r"scenes\.tsv.*domain_m"):
        regimes.label_scenes(
            frame.drop(columns="domain_m"),
            all_train(frame),
            regime_settings(),
            source="results/scenes.tsv",
        )
    with pytest.raises(InputError, match=r"case-05.*splits\.tsv"):
        regimes.label_scenes(
            frame,
            {c: "train" for c in frame["case"] if c != "case-05"},
            regime_settings(),
            splits_source="results/splits.tsv",
        )
    with pytest.raises(InputError, match="no cloudy scene of a train case"):
        regimes.label_scenes(frame, dict.fromkeys(frame["case"], "test"), regime_settings())
    with pytest.raises(InputError, match="repeated"):
        regimes.label_scenes(
            pd.concat([frame, frame.iloc[:1]]), all_train(frame), regime_settings()
        )


def test_settings_defaults_come_from_the_schema_and_round_trip():
    import yaml

    from conftest import REPO

    schema = yaml.safe_load((REPO / "src/lesprep/schemas/config.schema.yaml").read_text())
    props = schema["properties"]["regimes"]["properties"]
    s = regime_settings()
    assert list(s.descriptors) == props["descriptors"]["default"]
    assert [s.k_min, s.k_max] == props["k_range"]["default"]
    assert s.seed == props["seed"]["default"] and s.n_init == props["n_init"]["default"]
    assert RegimeSettings.from_dict(s.to_dict()) == s
    with pytest.raises(ConfigError, match="k_range"):
        regime_settings(k_range=[5, 3])


# ------------------------------------------------------------------ files and figures


def test_write_regimes_tables_and_figures(tmp_path):
    frame, _ = blob_scenes()
    scenes = tmp_path / "scenes.tsv"
    frame.to_csv(scenes, sep="\t", index=False)
    splits = tmp_path / "splits.tsv"
    write_assignment_tsv(
        [
            Assignment(
                case=c,
                regime="x",
                split="test" if c == "case-05" else "train",
                reason="pinned",
                u=0.5,
            )
            for c in sorted(set(frame["case"]))
        ],
        splits,
    )
    figs = {k: tmp_path / f"{k}.png" for k in ("silhouette", "descriptors", "timeline")}
    write_regime_outputs(
        scenes,
        splits,
        regime_settings(descriptors=FOUR),
        table_out=tmp_path / "regimes.tsv",
        fit_out=tmp_path / "regimes.json",
        figures=figs,
    )
    table = pd.read_csv(tmp_path / "regimes.tsv", sep="\t")
    assert list(table.columns) == ["case", "time_s", "split", "label", "clear"]
    assert len(table) == len(frame)
    assert set(table.loc[table["case"] == "case-05", "split"]) == {"test"}
    fit = json.loads((tmp_path / "regimes.json").read_text())
    assert fit["k"] == 3 and fit["used"] == FOUR and fit["clear_label"] == -1
    # physical centroids are the mean of each label's train scenes (k-means' fixed point)
    d = regimes.descriptor_frame(frame, FOUR)
    train = table["split"].eq("train").to_numpy()
    for label, centroid in enumerate(fit["centroids"]):
        rows = d.loc[train & (table["label"] == label).to_numpy(), FOUR].to_numpy()
        np.testing.assert_allclose(centroid, rows.mean(axis=0), rtol=1e-9)
    for png in figs.values():
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_figures_show_what_the_tables_hold(tmp_path):
    frame, _ = blob_scenes()
    frame.loc[0, ["cloud_cover", "peak_wavelength_m"]] = [0.0, np.nan]  # one clear scene
    scenes = tmp_path / "scenes.tsv"
    frame.to_csv(scenes, sep="\t", index=False)
    table, fit = regimes.label_scenes(frame, all_train(frame), regime_settings(descriptors=FOUR))
    table.to_csv(tmp_path / "regimes.tsv", sep="\t", index=False)
    (tmp_path / "regimes.json").write_text(json.dumps(fit.to_dict()))
    fig = regime_figures.regime_silhouette(tmp_path / "regimes.json", tmp_path / "s.png")
    curve = fig.axes[0].lines[0]
    assert list(curve.get_xdata()) == sorted(fit.silhouette)
    assert list(curve.get_ydata()) == [fit.silhouette[k] for k in sorted(fit.silhouette)]
    fig = regime_figures.regime_timeline(tmp_path / "regimes.tsv", tmp_path / "t.png")
    dots = fig.axes[0].collections[0]
    assert len(dots.get_offsets()) == len(table)
    # one colour per label, grey (matplotlib's "0.8") for the clear scene
    colours = {tuple(c) for c in dots.get_facecolors()}
    assert len(colours) == fit.k + 1 and (0.8, 0.8, 0.8, 1.0) in colours
    fig = regime_figures.regime_descriptors(
        scenes, tmp_path / "regimes.tsv", tmp_path / "regimes.json", tmp_path / "d.png"
    )
    assert len([ax for ax in fig.axes if ax.collections]) == 6  # pairs of four descriptors
