"""Numerics of the report: lambda_GC, the blockwise exact median, thinning, QQ quantiles."""

from __future__ import annotations

import json

import numpy as np
import pytest
import zarr
from scipy import stats

from widescreen.report import lambda_gc, thin_mask
from widescreen.report._plots import chrom_sort_key, genome_axis
from widescreen.report._scan import Counts, PValueScan, RankSelector, ScoreHistogram, scan
from widescreen.report._stats import (
    lambda_from_middle,
    order_band,
    qq_from_histogram,
    qq_points,
    thinning_plan,
)
from widescreen.schema import PassMeta, PassStats, RunLayout, create_stats


def _median_se(m: int) -> float:
    # Asymptotic sd of a sample median: 1 / (2 f(median) sqrt(m)) (standard large-sample result),
    # f the chi-square(1) density from scipy; divided by the median to put it on the lambda scale.
    med = stats.chi2.median(1)
    return 1.0 / (2.0 * stats.chi2.pdf(med, 1) * np.sqrt(m)) / med


def test_lambda_gc_is_one_on_null_p_values(rng):
    m = 200_000
    p = rng.random(m)  # uniform p-values: no inflation
    assert abs(lambda_gc(p) - 1.0) < 4 * _median_se(m)


def test_lambda_gc_recovers_an_inflation_of_one_and_a_half(rng):
    m = 200_000
    chi = 1.5 * rng.chisquare(1, m)
    p = stats.chi2.sf(chi, 1)
    assert abs(lambda_gc(p) - 1.5) < 4 * 1.5 * _median_se(m)


def test_lambda_gc_definition_against_scipy(rng):
    p = rng.random(1001) ** 1.3
    # Reference: median of scipy's chi2.isf(p, 1) over scipy's chi-square(1) median (common practice).
    ref = np.median(stats.chi2.isf(p, 1)) / stats.chi2.median(1)
    assert lambda_gc(p) == pytest.approx(ref, rel=1e-12)
    assert np.isnan(lambda_gc(np.array([np.nan])))


def _stats_group(path, cols: dict[str, np.ndarray], chunk: int) -> PassStats:
    """A finished pass "p" in run folder ``path`` holding ``cols``, made through the schema."""
    layout = RunLayout(path).pass_("p")
    layout.root.mkdir(parents=True)
    n = next(iter(cols.values())).size
    create_stats(layout, list(cols), n, chunk)
    g = zarr.open_group(layout.stats, mode="r+")
    for c, v in cols.items():
        g[c][:] = v
    n_blocks = -(-n // chunk)
    layout.done.mkdir()
    for i in range(n_blocks):
        layout.marker(i).write_text("{}")
    meta = PassMeta("t", tuple(cols), n_features=n, block_width=chunk, n_blocks=n_blocks)
    layout.meta.write_text(json.dumps(meta.to_dict()))
    return PassStats(path, "p")


@pytest.mark.parametrize("m", [1, 2, 999, 4096])
@pytest.mark.parametrize("gather_limit", [0, 7, 1 << 21])
def test_blockwise_median_is_exact(tmp_path, rng, m, gather_limit):
    p = rng.random(m) ** 2
    p[::5] = p[0]  # ties
    p[1::11] = np.nan
    filtered = (rng.random(m) < 0.1).astype(float)
    score = rng.random(m) + 0.01
    g = _stats_group(
        tmp_path / "s", {"p_value": p, "filtered": filtered, "score": score}, max(1, m // 6)
    )
    sel = RankSelector("p_value", gather_limit=gather_limit)
    scan(g, [sel], block=max(1, m // 4))
    kept = p[(filtered != 1) & np.isfinite(p)]
    assert sel.count == kept.size
    if kept.size == 0:
        assert np.isnan(sel.values[0])
        return
    # Reference: numpy.median of scipy.stats.chi2.isf over the tested features.
    ref = np.median(stats.chi2.isf(kept, 1)) / stats.chi2.median(1)
    assert lambda_from_middle(*sel.values) == pytest.approx(ref, rel=1e-12)
    np.testing.assert_array_equal(sel.values, np.sort(kept)[[(kept.size - 1) // 2, kept.size // 2]])


def test_blockwise_median_of_identical_values_resolves_all_bits(tmp_path):
    # With nothing gathered the selection walks all 64 bits; equal values must come back unchanged.
    p = np.full(300, 0.123456789)
    g = _stats_group(tmp_path / "s", {"p_value": p, "score": np.ones(300)}, 64)
    sel = RankSelector("p_value", gather_limit=0)
    scan(g, [sel], block=64)
    assert sel.values == (0.123456789, 0.123456789)


def test_untested_features_are_left_out(tmp_path):
    p = np.array([0.5, 1.0, 0.2, 1.0, 0.01])
    score = np.array([0.1, 0.0, 0.3, 0.2, 0.5])  # feature 1: score 0 with p 1 (constant)
    filtered = np.array([0, 0, 1, 0, 0.0])
    g = _stats_group(tmp_path / "s", {"p_value": p, "score": score, "filtered": filtered}, 2)
    counts, sel, hist = Counts(), RankSelector(), ScoreHistogram(bins=4)
    scan(g, [counts, sel, hist])
    assert (counts.features, counts.filtered, counts.untested) == (5, 1, 1)
    assert sel.count == 3 and sel.values == (0.5, 0.5)  # median of {0.5, 1.0, 0.01}
    assert hist.counts.sum() == 3


def test_thinning_keeps_every_point_above_the_threshold(rng):
    y = rng.exponential(1 / np.log(10), 50_000)  # -log10 of uniform p-values
    y[::97] = np.nan
    for fraction in (0.0, 0.01, 0.3):
        keep = thin_mask(y, 2.0, fraction, np.random.default_rng(1))
        above = y >= 2.0
        assert keep[above].all()
        assert not keep[np.isnan(y)].any()
        assert keep[~above].sum() < (~above).sum()
    assert thin_mask(y, 2.0, 1.0, rng).sum() == np.isfinite(y).sum()
    with pytest.raises(ValueError, match="fraction"):
        thin_mask(y, 2.0, 1.5, rng)


def test_pvalue_scan_keeps_strong_and_highlighted_points(tmp_path, rng):
    m = 60_000
    p = rng.random(m)
    p[[10, 20_000, 59_999]] = [1e-9, 1e-20, 0.0]
    score = rng.random(m) + 0.01
    g = _stats_group(tmp_path / "s", {"p_value": p, "score": score}, 4096)
    highlight = np.array([5, 30_000])
    pscan = PValueScan(m, threshold=3.0, max_below=2000, highlight=highlight)
    scan(g, [pscan], block=10_000)
    pts = pscan.points()
    y = -np.log10(np.maximum(p, np.finfo(float).tiny))
    strong = np.flatnonzero(y >= pscan.threshold)
    assert set(strong) <= set(pts["index"]) and set(highlight) <= set(pts["index"])
    assert pscan.n_above == strong.size and pscan.n_tested == m
    np.testing.assert_allclose(pts["y"], y[pts["index"]])
    assert pts["index"].size < 0.2 * m  # thinned
    # The same seed gives the same picture, whatever the block size.
    again = PValueScan(m, threshold=3.0, max_below=2000, highlight=highlight)
    scan(g, [again], block=10_000)
    np.testing.assert_array_equal(again.points()["index"], pts["index"])


def test_thinning_plan_spends_about_the_budget():
    t, f = thinning_plan(10_000_000, 3.0, 200_000)
    # Expected count under the null: the base share plus the ramp, m ln10 t 10^-t, with the null
    # density of y = -log10 p, ln10 10^-y (p uniform); integrated numerically with scipy.
    from scipy.integrate import quad

    def drawn(y):
        return np.log(10) * 10**-y * (f + (1 - f) * 10 ** (y - t))

    expected = 10_000_000 * quad(drawn, 0, t)[0]
    assert 0.9 * 200_000 < expected < 1.1 * 200_000
    assert thinning_plan(500, 3.0, 1000) == (3.0, 1.0)


def test_qq_from_histogram_matches_sorted_values(rng):
    p = np.concatenate([rng.random(30_000), 10.0 ** -rng.uniform(3, 12, 40)])
    y = -np.log10(p)
    edges = np.linspace(0, 3.0, 3001)
    counts = np.histogram(y[y < 3], bins=edges)[0]
    qq = qq_from_histogram(y[y >= 3], edges, counts)
    exact = np.sort(y)[::-1]  # reference: numpy sort
    assert qq.m == p.size
    assert np.max(np.abs(qq.observed - exact[qq.ranks - 1])) <= edges[1] - edges[0] + 1e-12
    np.testing.assert_allclose(qq.expected, -np.log10((qq.ranks - 0.5) / p.size))
    full = qq_points(p, max_points=10**9)
    np.testing.assert_allclose(full.observed, exact)


def test_order_band_covers_95_percent_of_uniform_order_statistics(rng):
    # Monte Carlo reference: the i-th smallest of m uniforms falls in the band about 95% of the time.
    m, i = 40, np.array([1, 5, 20, 40])
    lo, hi = order_band(i, m)
    sims = -np.log10(np.sort(rng.random((4000, m)), axis=1)[:, i - 1])
    inside = ((sims >= lo) & (sims <= hi)).mean(axis=0)
    np.testing.assert_allclose(inside, 0.95, atol=0.015)


def test_chromosomes_in_natural_order_side_by_side():
    names = ["chr10", "chrX", "chr2", "chr1", "scaffold_7"]
    assert sorted(names, key=chrom_sort_key) == ["chr1", "chr2", "chr10", "chrX", "scaffold_7"]
    lo, hi = np.array([5, 1, 1, 1, 1]), np.array([100, 50, 80, 60, 10])
    codes = np.array([0, 0, 1, 2, 3, 3, 4])
    pos = np.array([5, 100, 25, 80, 1, 60, 10])
    ax = genome_axis(codes, pos, names, lo, hi)
    assert ax["labels"] == ["1", "2", "10", "X", "scaffold_7"]
    b = ax["bounds"]
    assert np.all(b[1:, 0] > b[:-1, 1])  # chromosomes do not overlap
    x = ax["x"]
    assert x[4] < x[5] < x[3] < x[0] < x[1] < x[2] < x[6]  # 1, 2, 10, X, scaffold
    np.testing.assert_array_equal(ax["parity"], [0, 0, 1, 1, 0, 0, 0])
