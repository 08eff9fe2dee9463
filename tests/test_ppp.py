"""Point-process sampling and the set density.

References: counts of a Poisson point process in disjoint sets are independent Poisson
variables with means ∫_A λ (Daley & Vere-Jones 2003, An Introduction to the Theory of Point
Processes, vol. I, §2.4); the goodness of fit uses scipy.stats.poisson and
scipy.stats.chisquare / chi2_contingency. Set density = n! × ordered density (Mahler 2007,
Statistical Multisource-Multitarget Information Fusion, §11.3).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats as st

from sceneprior.geometry import Region
from sceneprior.models.likelihood import binned_loglik, per_scan_loglik
from sceneprior.simulate import Lowmarsh, sample_homogeneous, sample_thinning


def _count_gof(counts: np.ndarray, mean: float) -> float:
    """Chi-square p-value of counts against Poisson(mean) (scipy.stats.poisson), with the
    tails pooled so that every expected count is ≥ 5 (a textbook rule of thumb)."""
    top = int(max(counts.max(), st.poisson.ppf(1 - 1e-9, mean))) + 1
    k = np.arange(top)
    probs = st.poisson.pmf(k, mean)
    probs[-1] += st.poisson.sf(top - 1, mean)  # last bin holds everything ≥ top − 1
    obs = np.bincount(counts, minlength=top).astype(float)
    exp = probs * counts.size
    o, e = list(obs), list(exp)
    while len(e) > 2 and e[-1] < 5:
        last_e, last_o = e.pop(), o.pop()
        e[-1] += last_e
        o[-1] += last_o
    while len(e) > 2 and e[0] < 5:
        first_e, first_o = e.pop(0), o.pop(0)
        e[0] += first_e
        o[0] += first_o
    return st.chisquare(np.array(o), np.array(e)).pvalue


def test_thinning_counts_in_disjoint_subregions_are_independent_poisson():
    sc = Lowmarsh()
    region = sc.region()
    K = 6000
    rng = np.random.default_rng(2026)
    scan, r, b = sample_thinning(rng, region, sc.intensity, sc.lam_max(), K)
    # three disjoint subregions: inner sea, the shoal box, and the land sector
    subs = {
        "inner": Region("polar", (200.0, 1500.0), (-70.0, 0.0)),
        "shoal": Region("polar", (2600.0, 3800.0), (-40.0, -10.0)),
        "land": Region("polar", (200.0, 6000.0), (42.0, 70.0)),
    }
    counts = {}
    pvals = []
    for name, sub in subs.items():
        inside = sub.inside_bounds(r, b)
        c = np.bincount(scan[inside], minlength=K)
        n0, n1, w = sub.quadrature(48)
        mean = float(np.sum(w * sc.intensity(n0, n1)))  # ∫_A λ dA by Gauss–Legendre
        counts[name] = c
        pvals.append(_count_gof(c, mean))
        # the sample mean agrees with ∫_A λ within 4 standard errors
        assert abs(c.mean() - mean) < 4 * math.sqrt(mean / K), name
    # independence: chi-square contingency on (count ≥ median) indicators, pairwise
    names = list(counts)
    for i in range(3):
        for j in range(i + 1, 3):
            a = counts[names[i]] > np.median(counts[names[i]])
            bb = counts[names[j]] > np.median(counts[names[j]])
            table = np.array([[np.sum(a & bb), np.sum(a & ~bb)], [np.sum(~a & bb), np.sum(~a & ~bb)]])
            pvals.append(st.chi2_contingency(table).pvalue)
    # 6 simultaneous tests at a Bonferroni family level of 0.01 (DESIGN.md §7)
    assert min(pvals) > 0.01 / len(pvals), pvals


def test_homogeneous_sampler_cardinality_and_uniformity():
    region = Region("polar", (200.0, 6000.0), (-70.0, 70.0))
    rng = np.random.default_rng(4)
    density = 2e-7
    scan, r, b = sample_homogeneous(rng, region, density, 3000)
    counts = np.bincount(scan, minlength=3000)
    assert _count_gof(counts, density * region.area()) > 0.001
    # uniform by area: r² is uniform on [r0², r1²] (Kolmogorov–Smirnov, scipy.stats.kstest)
    u = (r**2 - 200.0**2) / (6000.0**2 - 200.0**2)
    assert st.kstest(u, "uniform").pvalue > 0.001
    assert st.kstest((b + 70.0) / 140.0, "uniform").pvalue > 0.001


def test_set_density_matches_poisson_cardinality_times_ordered_density(rng):
    """log f(Z) = log Poisson(n; λ̄) + log n! + Σ log(λ(z_i)/λ̄) for a piecewise-constant λ."""
    region = Region("cartesian", (0.0, 400.0), (0.0, 300.0))
    grid = region.grid((4, 3))
    lam = rng.uniform(1e-5, 5e-5, grid.n_cells)  # m⁻²
    area = grid.cell_area().reshape(-1)
    lam_bar = float(np.sum(lam * area))
    n = 9
    x, y = rng.uniform(0, 400, n), rng.uniform(0, 300, n)
    cell = grid.locate(x, y)
    counts = np.bincount(cell, minlength=grid.n_cells)
    ours = float(binned_loglik(np.log(lam), counts, area))
    ref = st.poisson.logpmf(n, lam_bar) + math.lgamma(n + 1) + np.sum(np.log(lam[cell] / lam_bar))
    assert ours == pytest.approx(ref, rel=1e-12, abs=1e-10)
    # per-scan form with a sparse scan × cell matrix gives the same number
    import scipy.sparse as sp

    m = sp.csr_matrix(counts[None, :])
    assert float(per_scan_loglik(np.log(lam)[None, :], m, area)[0, 0]) == pytest.approx(ref, rel=1e-12)
