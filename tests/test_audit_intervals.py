"""The audit's intervals, allocation and unknown cut against outside sources.

Sources, named beside each check: scipy.stats.binomtest(...).proportion_ci (reference implementation of the
exact and Wilson intervals); Newcombe 1998 (Statistics in Medicine 17:857, Table II) worked examples; Brown,
Cai & DasGupta 2001 (Statistical Science 16:101) on Wald and Wilson coverage, recomputed here exactly by
summing binomial probabilities; Garwood 1936 (Biometrika 28:437) exact Poisson limits, the one-stratum case of
Fay & Feuer 1997; Cochran 1977 (Sampling Techniques, 3rd ed., sec. 5.5) Neyman allocation n_h = n N_h S_h /
sum N S, recomputed by hand; the split-conformal quantile ceil((n + 1)(1 - alpha)) (Vovk, Gammerman & Shafer
2005; Angelopoulos & Bates 2021, sec. 1 and Theorem D.1) by hand; scikit-learn's NMI / ARI as reference
implementations of the batched bootstrap statistics.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom, binomtest, chi2, norm
from sklearn.metrics import adjusted_rand_score, normalized_mutual_info_score

from protomine.audit.plan import choose_objects, member_uncertainty, neyman_allocation
from protomine.audit.metrics import hungarian_accuracy_score
from protomine.audit.uncertainty import (_ari_tables, _encode, _tables, bootstrap_intervals, clopper_pearson_interval,
                                         labels_needed_for_width, stratified_purity, wilson_interval)
from protomine.mine.openset import conformal_cut, conformal_rank

Z = norm.ppf(0.975)


# --- one proportion ----------------------------------------------------------------------------

@pytest.mark.parametrize("k, n", [(0, 1), (1, 1), (0, 3), (3, 3), (2, 3), (7, 10), (31, 31), (30, 31), (81, 263)])
def test_clopper_pearson_equals_scipy_exact(k, n):
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")     # scipy reference
    lo, hi = clopper_pearson_interval(k, n)
    assert lo == pytest.approx(ref.low, abs=1e-10) and hi == pytest.approx(ref.high, abs=1e-10)


@pytest.mark.parametrize("k, n, exact, wilson", [
    # Newcombe 1998, Table II: method 5 (exact, Clopper-Pearson) and method 3 (Wilson score)
    (81, 263, (0.2527, 0.3676), (0.2553, 0.3662)),
    (15, 148, (0.0578, 0.1617), (0.0624, 0.1605)),
    (0, 20, (0.0000, 0.1684), (0.0000, 0.1611)),
    (1, 29, (0.0009, 0.1776), (0.0061, 0.1718)),
])
def test_newcombe_worked_examples(k, n, exact, wilson):
    assert clopper_pearson_interval(k, n) == pytest.approx(exact, abs=5e-5)
    assert wilson_interval(k, n) == pytest.approx(wilson, abs=5e-5)


def test_31_agreeing_labels_do_not_give_certainty():
    # issue example: 31 of 31 agreeing; exact lower limit (alpha/2)^(1/n) = 0.025^(1/31) = 0.8878 (closed form)
    lo, hi = clopper_pearson_interval(31, 31)
    assert lo == pytest.approx(0.025 ** (1 / 31), abs=1e-9) and hi == 1.0
    assert clopper_pearson_interval(0, 0) == (0.0, 1.0)


def _exact_coverage(n: int, p: float, interval) -> float:
    """P(interval(K, n) contains p) for K ~ Binomial(n, p): the sum over k of the binomial probabilities."""
    k = np.arange(n + 1)
    lo, hi = interval(k, n)
    return float(binom.pmf(k, n, p)[(lo <= p) & (p <= hi)].sum())


def _wald(k, n):
    p = k / n
    half = Z * np.sqrt(p * (1 - p) / n)
    return p - half, p + half


def _wilson_array(k, n):
    pairs = [wilson_interval(int(x), n) for x in k]
    return np.array([a for a, _ in pairs]), np.array([b for _, b in pairs])


def test_wald_and_wilson_under_cover_near_one_where_exact_does_not():
    # Brown, Cai & DasGupta 2001: the Wald interval's coverage collapses for small n and p near 0 or 1, and
    # Wilson's dips below nominal close to the boundary.  Exact coverages (recomputed here):
    assert _exact_coverage(5, 0.97, _wald) < 0.2           # 0.141
    assert _exact_coverage(10, 0.9, _wald) < 0.7           # 0.650
    assert _exact_coverage(5, 0.97, _wilson_array) < 0.9   # 0.859
    # Clopper-Pearson holds its level at every p (its defining property), here on a grid of p for n = 3..30
    worst = min(_exact_coverage(n, p, clopper_pearson_interval)
                for n in (3, 5, 10, 30) for p in np.linspace(0.005, 0.995, 67))
    assert worst >= 0.95                                   # measured 0.954


@pytest.mark.parametrize("p", [None, 0.5, 0.9, 1.0])
@pytest.mark.parametrize("width", [0.1, 0.2, 0.4])
def test_labels_needed_reaches_width_and_is_minimal(p, width):
    n, ok = labels_needed_for_width(p, width, size=10_000)
    q = 0.5 if p is None else p
    lo, hi = clopper_pearson_interval(round(q * n), n)
    assert ok and hi - lo <= width
    lo, hi = clopper_pearson_interval(round(q * (n - 1)), n - 1)
    assert hi - lo > width


def test_labels_needed_capped_at_cluster_size():
    # a 9-member cluster cannot reach a 0.2-wide interval even fully labelled (9/9: [0.664, 1])
    assert labels_needed_for_width(1.0, 0.2, size=9) == (9, False)
    assert labels_needed_for_width(None, 0.2, size=1) == (1, False)
    # common practice: n ~ (z / half-width)^2 p (1 - p) = 96 at p = 0.5 for +-0.1; exact intervals need a few more
    n, ok = labels_needed_for_width(None, 0.2, size=1000)
    assert ok and 96 <= n <= 110


# --- overall purity ----------------------------------------------------------------------------

def test_one_stratum_is_the_exact_poisson_interval_of_the_disagreements():
    # Fay & Feuer 1997 with one stratum reduces to Garwood's exact Poisson limits on the e disagreeing labels:
    # [chi2(a/2; 2e) / 2, chi2(1 - a/2; 2e + 2) / 2] / n
    for e, n in [(0, 31), (1, 10), (3, 20), (7, 30)]:
        est, lo, hi = stratified_purity([[n - e]], [[n]], [50])
        assert est[0] == pytest.approx(1 - e / n)
        assert 1 - lo[0] == pytest.approx(chi2.ppf(0.975, 2 * e + 2) / 2 / n, rel=1e-9)
        assert 1 - hi[0] == pytest.approx(chi2.ppf(0.025, 2 * e) / 2 / n if e else 0.0, abs=1e-12)


def test_stratified_estimate_is_the_size_weighted_mean():
    k, n, size = np.array([[3, 5, 2]]), np.array([[3, 6, 4]]), np.array([100, 50, 10])
    est, lo, hi = stratified_purity(k, n, size)
    assert est[0] == pytest.approx((100 * 1 + 50 * 5 / 6 + 10 * 0.5) / 160)     # by hand
    assert lo[0] < est[0] < hi[0] <= 1
    with pytest.raises(ValueError):
        stratified_purity([[4]], [[3]], [10])


SIZES = np.array([40, 45, 60, 80, 120, 200, 300, 500])     # 8 clusters, 40 to 500 members


def _simulate(purity: np.ndarray, n: int, reps: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Majority counts (reps, H) of n labels drawn without replacement per cluster, and the true purities (H,).

    Cluster h holds round(purity_h N_h) members of its class and splits the rest over two other classes, so
    the sample majority is the audit's own (it may pick a minority class when labels are few)."""
    k = np.zeros((reps, SIZES.size), np.int64)
    true = np.zeros(SIZES.size)
    for h, N in enumerate(SIZES):
        major = int(round(purity[h] * N))
        labels = np.zeros(N, np.int64)
        labels[major:major + (N - major) // 2] = 1
        labels[major + (N - major) // 2:] = 2
        true[h] = major / N
        drawn = labels[np.argsort(rng.random((reps, N)), axis=1)[:, :n]]                  # (reps, n)
        k[:, h] = np.stack([(drawn == c).sum(axis=1) for c in range(3)], axis=1).max(axis=1)
    return k, true


@pytest.mark.parametrize("p", [0.6, 0.8, 0.9, 0.97, 1.0])
@pytest.mark.parametrize("n", [3, 5, 10, 30])
def test_purity_intervals_hold_their_coverage(p, n):
    # the audit's estimators (stratified_purity overall, clopper_pearson_interval per cluster) on 300 simulated
    # label draws; nominal 95%, required >= 0.93 overall and for every cluster, never zero width
    rng = np.random.default_rng(int(p * 1000) * 100 + n)
    k, true = _simulate(np.full(SIZES.size, p), n, 300, rng)
    labelled = np.full_like(k, n)
    est, lo, hi = stratified_purity(k, labelled, SIZES)
    overall = float((true * SIZES).sum() / SIZES.sum())
    assert np.mean((lo <= overall) & (overall <= hi)) >= 0.93          # measured 0.985-1.000
    assert np.all(hi - lo > 0)
    clo, chi = clopper_pearson_interval(k, labelled)
    per_cluster = np.mean((clo <= true) & (true <= chi), axis=0)
    assert per_cluster.min() >= 0.93
    assert np.all(chi - clo > 0)


@pytest.mark.parametrize("impure", [0.6, 0.8])
@pytest.mark.parametrize("n", [3, 10])
def test_overall_interval_holds_when_one_large_cluster_is_impure(impure, n):
    # the hard case for pooled (effective sample size) intervals: the largest cluster impure, all others clean
    purity = np.ones(SIZES.size)
    purity[-1] = impure
    k, true = _simulate(purity, n, 300, np.random.default_rng(7 + n))
    _, lo, hi = stratified_purity(k, np.full_like(k, n), SIZES)
    overall = float((true * SIZES).sum() / SIZES.sum())
    assert np.mean((lo <= overall) & (overall <= hi)) >= 0.93          # measured 0.99-1.00


def test_naive_stratified_wald_interval_fails_the_same_simulation():
    # the check above can fail: a stratified Wald interval (estimate +- z sqrt(sum W^2 p(1-p)/n)) under-covers
    # at purity 0.97 with 5 labels per cluster, and is zero-width whenever every label agrees
    k, true = _simulate(np.full(SIZES.size, 0.97), 5, 300, np.random.default_rng(11))
    W = SIZES / SIZES.sum()
    ph = k / 5
    est = (W * ph).sum(axis=1)
    half = Z * np.sqrt((W ** 2 * ph * (1 - ph) / 5).sum(axis=1))
    overall = float((true * SIZES).sum() / SIZES.sum())
    assert np.mean((est - half <= overall) & (overall <= est + half)) < 0.8
    assert np.any(half == 0)


# --- NMI / ARI / accuracy ----------------------------------------------------------------------

def _nmi_tables(T: np.ndarray) -> np.ndarray:
    """(B,) NMI (arithmetic normalisation, Manning et al. 2008 eq. 16.3) of contingency tables (B, k, m)."""
    n = T.sum(axis=(1, 2))[:, None]
    a, b = T.sum(axis=2) / n, T.sum(axis=1) / n
    p = T / n[:, :, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        mi = np.nansum(np.where(p > 0, p * np.log(p / (a[:, :, None] * b[:, None, :])), 0.0), axis=(1, 2))
        h = lambda q: -np.nansum(np.where(q > 0, q * np.log(q), 0.0), axis=1)  # noqa: E731
        return mi / ((h(a) + h(b)) / 2)


def test_batched_ari_equals_scikit_learn():
    rng = np.random.default_rng(3)
    for _ in range(100):
        n = int(rng.integers(2, 40))
        c = rng.integers(0, rng.integers(1, 5), n)
        lab = rng.integers(0, rng.integers(1, 4), n)
        ci, li, k, m = _encode(c, lab)
        T = _tables(ci, li, k, m, np.arange(n)[None])
        assert _ari_tables(T)[0] == pytest.approx(adjusted_rand_score(lab, c), abs=1e-9)
        if np.unique(c).size > 1 and np.unique(lab).size > 1:
            assert _nmi_tables(T)[0] == pytest.approx(normalized_mutual_info_score(lab, c), abs=1e-9)


def _population(purity: float, rng):
    """8 clusters of 100; a member keeps its cluster's class with prob. ``purity``, else a random class."""
    pc = np.repeat(np.arange(8), 100)
    pl = np.where(rng.random(pc.size) < purity, pc, rng.integers(0, 8, pc.size))
    return pc, pl


@pytest.mark.parametrize("n", [10, 30])
def test_ari_and_accuracy_bootstrap_cover_nmi_does_not(n):
    # 120 label samples (n per cluster) of a population with purity 0.8: the audit's ARI / accuracy intervals
    # cover the population value (measured 0.94-0.98); the same percentile bootstrap of NMI covers it far less
    # often (measured 0.08 at n = 10, 0.44 at n = 30), which is why the audit gives no NMI interval
    rng = np.random.default_rng(n)
    pc, pl = _population(0.8, rng)
    truth = {"ari": adjusted_rand_score(pl, pc), "hungarian_accuracy": hungarian_accuracy_score(pc, pl),
             "nmi": normalized_mutual_info_score(pl, pc)}
    hits = {k: [] for k in truth}
    for _ in range(120):
        idx = np.concatenate([rng.choice(np.flatnonzero(pc == k), n, replace=False) for k in range(8)])
        out = bootstrap_intervals(pc[idx], pl[idx].astype(str), rng, n_resamples=200)
        assert out["nmi"]["interval"] is None and "biased" in out["nmi"]["reason"]
        for k in ("ari", "hungarian_accuracy"):
            lo, hi = out[k]["interval"]
            hits[k].append(lo <= truth[k] <= hi)
        ci, li, kk, m = _encode(pc[idx], pl[idx])
        nmi = _nmi_tables(_tables(ci, li, kk, m, rng.integers(0, idx.size, (200, idx.size))))
        lo, hi = np.quantile(nmi, [0.025, 0.975])
        hits["nmi"].append(lo <= truth["nmi"] <= hi)
    assert np.mean(hits["ari"]) >= 0.88 and np.mean(hits["hungarian_accuracy"]) >= 0.88
    assert np.mean(hits["nmi"]) < 0.7


def test_bootstrap_says_why_instead_of_a_degenerate_interval():
    clean_c = np.repeat(np.arange(3), 12)                     # 36 labels, every cluster clean
    out = bootstrap_intervals(clean_c, clean_c.astype(str), np.random.default_rng(0), n_resamples=200)
    for k in ("ari", "hungarian_accuracy"):
        assert out[k]["interval"] is None and "same value" in out[k]["reason"]
    few = bootstrap_intervals(np.arange(9) % 3, np.array(list("abcabcabb")), np.random.default_rng(0))
    assert all(few[k]["interval"] is None and "per cluster" in few[k]["reason"] for k in ("ari", "hungarian_accuracy"))
    rng = np.random.default_rng(7)
    c = rng.integers(0, 3, 60)
    lab = np.where(rng.random(60) < 0.8, c, rng.integers(0, 3, 60)).astype(str)
    a = bootstrap_intervals(c, lab, np.random.default_rng(1), n_resamples=300)
    assert a == bootstrap_intervals(c, lab, np.random.default_rng(1), n_resamples=300)
    lo, hi = a["ari"]["interval"]
    assert lo < adjusted_rand_score(lab, c) < hi


# --- labelling plan ----------------------------------------------------------------------------

def test_neyman_allocation_hand_worked():
    # Cochran 1977 sec. 5.5: n_h = n N_h S_h / sum N S.  By hand: N = 400, 300, 200, 100, S = .5, .3, .4, .2:
    # N S = 200, 90, 80, 20 (sum 390); n = 39 gives 20, 9, 8, 2
    assert neyman_allocation(39, [400, 300, 200, 100], [0.5, 0.3, 0.4, 0.2]).tolist() == [20, 9, 8, 2]
    # 10 more labels with 5, 0, 3, 1 in hand: the unlabelled cluster is served first, the total lands near
    # Neyman's for n = 19 (9.7, 4.4, 3.9, 1.0) -> 10, 4, 4, 1 held
    new = neyman_allocation(10, [400, 300, 200, 100], [0.5, 0.3, 0.4, 0.2], have=[5, 0, 3, 1])
    assert new.sum() == 10 and (new + [5, 0, 3, 1]).tolist() == [10, 4, 4, 1]
    # a cluster never gets more than its unlabelled members; fewer than asked only when every cluster is full
    assert neyman_allocation(50, [10, 10], [0.5, 0.5], have=[8, 0]).tolist() == [2, 10]


def test_choose_objects_mixes_random_and_unsure_members():
    rng = np.random.default_rng(0)
    cluster = np.repeat([0, 1, 2], [50, 30, 20])
    score = rng.random(100)
    u = member_uncertainty(score, rng.random(100), np.full(100, np.inf))
    assert u == pytest.approx(0.5 * (1 - score))
    labelled = np.zeros(100, bool)
    labelled[[0, 1, 2]] = True
    idx, rnd = choose_objects(cluster, u, labelled, 12, np.random.default_rng(1), random_share=0.5)
    assert idx.size == 12 and np.unique(idx).size == 12 and not labelled[idx].any()
    assert set(cluster[idx].tolist()) == {0, 1, 2}                        # unlabelled clusters 1, 2 get labels
    for c in (0, 1, 2):
        mine = cluster[idx] == c
        m = int(mine.sum())
        assert int(rnd[mine].sum()) == int(np.ceil(m / 2))
        unsure = idx[mine & ~rnd]
        rest = np.setdiff1d(np.flatnonzero((cluster == c) & ~labelled), idx[mine & rnd])
        assert set(unsure.tolist()) == set(rest[np.argsort(-u[rest])][:unsure.size].tolist())


# --- conformal unknown cut ---------------------------------------------------------------------

def test_conformal_rank_and_cut_by_hand():
    # ceil((n + 1)(1 - alpha)): n = 19, alpha = 0.1 -> ceil(18.0) = 18; n = 19, alpha = 0.05 -> 19; n = 18 -> 19 > n
    assert conformal_rank(19, 0.1) == 18 and conformal_rank(19, 0.05) == 19 and conformal_rank(18, 0.05) == 19
    scores = np.arange(1, 20) / 100.0                 # 0.01 .. 0.19, nonconformity 1 - s = 0.99 .. 0.81
    # r = 18: the 18th smallest nonconformity is 0.98 (only 0.99 is larger), so the cut is 1 - 0.98 = 0.02:
    # only the view scoring 0.01 would be flagged
    assert conformal_cut(scores, 0.1) == pytest.approx(0.02)
    assert conformal_cut(scores, 0.05) == pytest.approx(0.01)          # r = 19: nothing below 0.01 in the set
    assert conformal_cut(scores[:18], 0.05) == 0.0                     # r > n: too few views, never flag


def test_conformal_cut_flags_at_most_alpha_of_new_known_views():
    # marginal guarantee (Angelopoulos & Bates 2021, Theorem D.1): alpha - 1/(n+1) <= P(flag) <= alpha for
    # continuous exchangeable scores; 2000 calibration sets of n = 59 views, one new view each
    rng = np.random.default_rng(5)
    alpha, n, sets = 0.05, 59, 2000
    flags = []
    for _ in range(sets):
        s = rng.beta(2, 1.2, n + 1)                   # any continuous law
        flags.append(s[-1] < conformal_cut(s[:-1], alpha))
    rate = float(np.mean(flags))
    sd = (alpha * (1 - alpha) / sets) ** 0.5
    assert alpha - 1 / (n + 1) - 3 * sd <= rate <= alpha + 3 * sd     # bounds 0.033 .. 0.05, measured 0.048


def test_mining_records_the_conformal_cut_of_its_held_out_views(tiny_world):
    # the library's cut is conformal_cut of the held-out single views' scores at the configured alpha
    from protomine.ingest.sharded import open_store
    from protomine.mine.library import match_score, read_library
    from protomine.mine.pipeline import single_view_distances
    lib = read_library(tiny_world["library"])
    st = open_store(tiny_world["store"])
    P, V = lib.prototypes["features"], lib.prototypes["weights"]
    d, k = single_view_distances(st, tiny_world["cfg"], P, V, np.asarray(lib.members["cluster"]), tuple(lib.scales))
    d, k = d[np.isfinite(d)], k[np.isfinite(d)]
    s = match_score(d, lib.prototypes["single_mu"][k], lib.prototypes["single_sigma"][k])
    assert lib.attrs["unknown_alpha"] == 0.05 and lib.attrs["unknown_calibration_views"] == d.size
    assert float(lib.attrs["unknown_cut"]) == pytest.approx(conformal_cut(s, 0.05), abs=1e-6)
