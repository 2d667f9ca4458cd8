"""Stratified accuracy and area estimators against Olofsson et al. 2014 and a Monte Carlo study."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fcnkit.assessment import (
    TABLE_FIELDS,
    allocate_sample,
    assessment_rows,
    assessment_table,
    plan_sample_size,
    stratified_estimates,
)

# Olofsson, Foody, Herold, Stehman, Woodcock & Wulder 2014, Remote Sensing of Environment 148: 42–57, the
# worked example: map classes deforestation, forest gain, stable forest, stable non-forest; pixels of 30 m.
PAPER_MAPPED = [200_000, 150_000, 3_200_000, 6_450_000]
PAPER_SAMPLE = [[66, 0, 5, 4], [0, 55, 8, 12], [1, 0, 153, 11], [2, 1, 9, 313]]
PAPER_NAMES = ["deforestation", "forest gain", "stable forest", "stable non-forest"]


def test_paper_example_areas():
    t = assessment_table(PAPER_SAMPLE, PAPER_MAPPED, names=PAPER_NAMES, pixel_area_m2=900.0)
    ha = {c["name"]: c["area"]["ha"] for c in t["classes"]}
    # the paper (and issue 11): deforestation 21,158 ha ± 6,158 ha (95 %)
    assert round(ha["deforestation"]["estimate"]) == 21_158
    assert round(1.96 * ha["deforestation"]["se"]) == 6_158
    lo, hi = ha["deforestation"]["ci95"]
    assert lo == pytest.approx(21_158 - 6_158, abs=1) and hi == pytest.approx(21_158 + 6_158, abs=1)
    # the other three classes as the paper reports them (recalled from memory; rounded to whole hectares)
    for name, area, half in (("forest gain", 11_686, 3_756), ("stable forest", 285_770, 15_510),
                             ("stable non-forest", 581_386, 16_282)):
        assert round(ha[name]["estimate"]) == area
        assert round(1.96 * ha[name]["se"]) == half
    # the estimated areas add up to the mapped total (900,000 ha)
    assert sum(v["estimate"] for v in ha.values()) == pytest.approx(900_000)
    assert t["classes"][0]["area"]["m2"]["estimate"] == pytest.approx(ha["deforestation"]["estimate"] * 1e4)


def test_paper_example_accuracies():
    # values reported by the paper for its example, recalled from memory, rounded there to two decimals
    # (so compared within 0.005): estimate and 95 % half-width
    t = assessment_table(PAPER_SAMPLE, PAPER_MAPPED, names=PAPER_NAMES)
    o = t["overall_accuracy"]
    assert o["estimate"] == pytest.approx(0.95, abs=0.005) and 1.96 * o["se"] == pytest.approx(0.02, abs=0.005)
    users = [(0.88, 0.07), (0.73, 0.10), (0.93, 0.04), (0.96, 0.02)]
    for c, (u, half) in zip(t["classes"], users, strict=True):
        assert c["users_accuracy"]["estimate"] == pytest.approx(u, abs=0.005)
        assert 1.96 * c["users_accuracy"]["se"] == pytest.approx(half, abs=0.005)
    producers = [0.75, 0.85, 0.93, 0.96]
    for c, p in zip(t["classes"], producers, strict=True):
        assert c["producers_accuracy"]["estimate"] == pytest.approx(p, abs=0.005)
    # half-widths of producer's accuracy recalled for deforestation and the two stable classes (the one for
    # forest gain is not recalled reliably, so not asserted)
    for i, half in ((0, 0.21), (2, 0.03), (3, 0.02)):
        assert 1.96 * t["classes"][i]["producers_accuracy"]["se"] == pytest.approx(half, abs=0.005)


def test_paper_example_user_accuracy_is_the_sample_row_fraction():
    # Olofsson et al. 2014: under stratified sampling by map class, U_i = n_ii / n_i· (the row fraction)
    est = stratified_estimates(PAPER_SAMPLE, PAPER_MAPPED)
    n = np.array(PAPER_SAMPLE)
    np.testing.assert_allclose(est.users, np.diag(n) / n.sum(axis=1))
    np.testing.assert_allclose(est.proportions.sum(axis=1), np.array(PAPER_MAPPED) / sum(PAPER_MAPPED))


def test_paper_sample_size_example():
    # Olofsson et al. 2014, sample-size example (recalled from memory): anticipated user's accuracies 0.70, 0.60,
    # 0.90, 0.95 and a target SE of overall accuracy of 0.01 give n ≈ 641
    assert plan_sample_size(PAPER_MAPPED, [0.70, 0.60, 0.90, 0.95], 0.01) == 641


def test_sample_size_formula():
    # Cochran 1977: n = (Σ W_i S_i / S(O))², S_i = √(U_i(1−U_i)); one U for all strata gives U(1−U)/S(O)²,
    # the simple-random-sampling size for a proportion
    assert plan_sample_size([5, 1, 4], 0.8, 0.02) == 400
    with pytest.raises(ValueError):
        plan_sample_size([5, 1], 1.0)


@settings(max_examples=60, deadline=None)
@given(mapped=st.lists(st.integers(0, 10**9), min_size=1, max_size=8).filter(lambda m: sum(m) > 0),
       total=st.integers(0, 3000), minimum=st.integers(0, 120))
def test_allocation_rule(mapped, total, minimum):
    n = allocate_sample(total, mapped, minimum)
    m = np.array(mapped)
    floor = np.minimum(minimum, m)
    assert (n >= floor).all() and (n <= m).all()
    assert n.sum() == min(max(total, int(floor.sum())), int(m.sum()))
    free = (n > floor) & (n < m)  # strata neither at their floor nor full take a proportional share
    if free.sum() >= 2:
        ratio = n[free] / m[free]
        # proportional up to the rounding of each share to whole points
        assert (np.abs(n[free] - m[free] * ratio.mean()) <= 1 + m[free] * (ratio.max() - ratio.min())).all()
        assert ratio.max() - ratio.min() <= 2 / m[free].min() + 1e-12


def test_allocation_examples():
    # proportional allocation when every share clears the floor (common practice)
    assert allocate_sample(100, [600, 300, 100], 5).tolist() == [60, 30, 10]
    # rare strata raised to the floor, the remainder shared in proportion among the large ones: by hand,
    # 640 − 2 × 75 = 490 points; 490 × 3.2/9.65 = 162.49 and 490 × 6.45/9.65 = 327.51
    assert allocate_sample(640, PAPER_MAPPED, 75).tolist() == [75, 75, 162, 328]
    # a stratum with fewer pixels than its floor is taken whole
    assert allocate_sample(100, [1000, 3], 50).tolist() == [97, 3]


def test_empty_stratum_and_bad_inputs():
    est = stratified_estimates([[8, 2, 0], [1, 9, 0], [0, 0, 0]], [500, 500, 0])
    assert np.isnan(est.users[2]) and est.area[2] == 0 and est.area_se[2] == 0
    with pytest.raises(ValueError, match="two sample points"):
        stratified_estimates([[8, 2], [1, 0]], [500, 500])
    with pytest.raises(ValueError, match="does not match"):
        stratified_estimates([[8, 2], [1, 9]], [500, 500, 1])


def test_table_rows():
    t = assessment_table(PAPER_SAMPLE, PAPER_MAPPED, names=PAPER_NAMES, ids=[1, 2, 3, 4], pixel_area_m2=900.0)
    rows = assessment_rows(t)
    assert all(set(r) == set(TABLE_FIELDS) for r in rows)
    defo = [r for r in rows if r["quantity"] == "area" and r["unit"] == "ha" and r["class_id"] == 1]
    assert len(defo) == 1 and defo[0]["class"] == "deforestation" and round(defo[0]["estimate"]) == 21_158
    cells = [r for r in rows if r["quantity"] == "error_matrix_proportion"]
    assert len(cells) == 16 and sum(r["estimate"] for r in cells) == pytest.approx(1.0)


def test_monte_carlo_interval_coverage():
    """Synthetic map with known truth; 1,000 stratified random samples (without replacement, as drawn from the
    map); the nominal 95 % interval of each class's area should cover the true area in about 95 % of them —
    93–97 % allows for the binomial spread of 1,000 trials (SE ≈ 0.7 %). Olofsson et al. 2014's intervals are
    normal approximations, so a design with moderate proportions and ≥ 100 points per stratum is used."""
    rng = np.random.default_rng(2014)
    k = 4
    shape = (600, 800)
    # truth: four land-cover classes with unequal areas; the map errs on 8–20 % of each class's pixels
    truth = rng.choice(k, size=shape, p=[0.08, 0.12, 0.3, 0.5])
    mapped = truth.copy()
    err = rng.random(shape) < np.array([0.2, 0.15, 0.1, 0.08])[truth]
    mapped[err] = (truth[err] + rng.integers(1, k, err.sum())) % k
    population = np.zeros((k, k), np.int64)  # pixels per (map class, true class)
    np.add.at(population, (mapped.ravel(), truth.ravel()), 1)
    true_area = population.sum(axis=0)
    mapped_pixels = population.sum(axis=1)
    n_h = allocate_sample(600, mapped_pixels, 100)
    reps = 1000
    counts = np.stack([rng.multivariate_hypergeometric(population[h], n_h[h], size=reps) for h in range(k)], axis=1)
    est = stratified_estimates(counts, mapped_pixels)  # all 1,000 samples at once
    total = mapped_pixels.sum()
    lo = total * (est.area - 1.96 * est.area_se)
    hi = total * (est.area + 1.96 * est.area_se)
    coverage = ((lo <= true_area) & (true_area <= hi)).mean(axis=0)
    assert ((coverage >= 0.93) & (coverage <= 0.97)).all(), coverage
    # the estimator is unbiased: the mean estimate is within a few standard errors of the truth
    spread = 3 * total * est.area_se.mean(axis=0) / np.sqrt(reps)
    assert (np.abs(total * est.area.mean(axis=0) - true_area) < spread).all()
    # overall accuracy interval too
    true_oa = np.trace(population) / total
    oa_cover = (np.abs(est.overall - true_oa) <= 1.96 * est.overall_se).mean()
    assert 0.93 <= oa_cover <= 0.97, oa_cover
