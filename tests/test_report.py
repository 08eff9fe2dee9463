"""``sceneprior report``: the page, its figures, and that a real browser renders them.

The browser check uses Debian's chromium in headless mode (.ci/run installs it); the test
skips, saying why, only where no chromium executable is available.

The per-scan count figure of a heavily gated run is checked against scipy.stats.poisson:
scan k's predictive law is the mixture over the posterior draws s of Poisson(ρ_s|W_k|), with
|W_k| = |W| − (number of gates)·πr² for discs wholly inside the box and apart (elementary
geometry), and its 5–95 % range holds the observed count with probability ≥ 0.90 (binomial
bound at the two-sided 99 % level over the scans).
"""

from __future__ import annotations

import base64
import html
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from sceneprior.cli import main

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs: list[tuple[str, str]] = []

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            if k in ("src", "href") and v is not None:
                self.refs.append((tag, v))


def figure_refs(page: Path):
    p = _Refs()
    p.feed(page.read_text(encoding="utf-8"))
    return p.refs


def check_references(page: Path) -> int:
    """Every referenced figure exists and is non-empty; returns the number of images."""
    n_img = 0
    for tag, ref in figure_refs(page):
        if ref.startswith("data:"):
            head, _, payload = ref.partition(",")
            assert head == "data:image/png;base64", head
            data = base64.b64decode(payload, validate=True)
            assert data.startswith(PNG_SIGNATURE) and len(data) > 1000
        else:
            assert not re.match(r"^[a-z]+://", ref), f"external reference {ref}"
            f = page.parent / ref
            assert f.is_file() and f.stat().st_size > 0, ref
        n_img += tag == "img"
    return n_img


@pytest.fixture(scope="module")
def demo_report(demo_run):
    run = demo_run / "demo"
    assert main(["report", str(run)]) == 0
    return run / "report.html"


def test_report_demo_figures_and_content(demo_report, demo_run):
    n = check_references(demo_report)
    assert n >= 4  # maps, counts, rate, chains
    text = html.unescape(demo_report.read_text(encoding="utf-8"))
    summary = json.loads((demo_run / "demo" / "summary.json").read_text())
    assert summary["caution"] in text
    assert "Convergence gate passed" in text and "Gate checks" in text
    assert "Per-scan count histogram not drawn" not in text  # the demo keeps its per-scan counts


def test_report_cellwise_with_exceedance_map(cellwise_polar_run, tmp_path):
    """A run with per-cell parameters and an exceedance map: the page gains that figure and
    the gate's cell checks. The exceedance probability P(λ_c > t) is computed here from the
    run's own cell draws (the fraction of draws above t) and added to a copy of the run."""
    import xarray as xr

    src, _ = cellwise_polar_run
    run = tmp_path / "run"
    shutil.copytree(src, run)
    base = tmp_path / "base.html"
    assert main(["report", str(run), "--out", str(base)]) == 0
    n_base = check_references(base)
    cd = xr.load_dataset(run / "cell_draws.nc", engine="h5netcdf")
    ds = xr.load_dataset(run / "intensity.nc", engine="h5netcdf")
    t = 2e-7  # m⁻² scan⁻¹
    p = (cd["intensity"].values > t).mean(axis=0).reshape(ds["intensity_mean"].shape)
    p = np.where(np.isnan(ds["intensity_mean"].values), np.nan, p)
    ds["exceedance_2e-07"] = (("range", "bearing"), p, {"long_name": "P(intensity > 2e-7 m-2 scan-1)"})
    ds.to_netcdf(run / "intensity.nc", engine="h5netcdf")
    assert main(["report", str(run)]) == 0
    page = run / "report.html"
    assert check_references(page) == n_base + 1
    text = page.read_text(encoding="utf-8")
    assert "cell_r_hat_q99" in text and "cell_ess_bulk_median" in text
    assert "No exceedance map" not in text


def test_count_figure_follows_each_scans_window(tmp_path):
    """Heavily gated recording: the second half of the scans has 4 disc gates of radius 120 m
    (36 % of the window) in every scan. The figure's per-scan mean, 5–95 % range and expected
    histogram are those of the mixture of Poisson(ρ_s|W_k|) over all posterior draws (scipy),
    and the observed counts stay inside the per-scan ranges; with the overall rate for every
    scan they would not."""
    from scipy.stats import binom, poisson

    from conftest import lane_gate_recording, quick_fit
    from sceneprior.report import count_predictive, write_report
    from sceneprior.results import load_run, write_run

    K, rate = 300, 20.0
    spec, n_out, ws = lane_gate_recording(
        tmp_path, np.random.default_rng(17), rate, np.repeat([0.0, 1.0], K // 2), radius=120.0, name="gated",
        sampler={"method": "exact", "chains": 4, "draws": 500, "seed": 3, "progress": False},
        output={"dir": str(tmp_path / "runs")})
    run = load_run(write_run(quick_fit(spec)))
    assert ws[K // 2:].max() < 0.64 + 1e-3
    cp = count_predictive(run, np.asarray(run.scans["n"].values), max_draws=10_000)  # all 2000 draws
    assert cp.per_scan and cp.draws == 2000
    np.testing.assert_array_equal(cp.n, n_out)
    r = np.asarray(run.posterior.posterior["rate"]).reshape(-1)  # ρ_s|W|, chain-major
    mu = r[:, None] * ws[None, :]  # ρ_s|W_k|
    # the run keeps per-cell draws in float32 (cell_draws.nc), which the gated part of μ_sk
    # is computed from: relative round-off up to ~1e-7, hence rtol 1e-6
    np.testing.assert_allclose(cp.scan_mean, mu.mean(axis=0), rtol=1e-6)
    j = cp.k
    F = np.stack([poisson.cdf(j[:, None], mu[:, k][None, :]).mean(axis=1) for k in range(K)])  # (K, J)
    for level, got in ((0.05, cp.scan_lo), (0.95, cp.scan_hi)):  # smallest j with F ≥ level
        q = [np.array([np.searchsorted(F[k], level + e) for k in range(K)]) for e in (-1e-6, 1e-6)]
        assert ((got >= q[0]) & (got <= q[1])).all() and (q[0] == q[1]).mean() > 0.9
    np.testing.assert_allclose(cp.expected, np.diff(F, axis=1, prepend=0.0).sum(axis=0), rtol=1e-6, atol=1e-12)
    assert cp.scan_hi[K // 2:].max() < cp.scan_lo[: K // 2].min() + 10  # the band drops with the window
    bound = binom.ppf(0.995, K, 0.10)  # P(outside the 5–95 % range) ≤ 0.10 per scan
    outside = int(((cp.n < cp.scan_lo) | (cp.n > cp.scan_hi)).sum())
    assert outside <= bound, (outside, bound)
    q05, q95 = poisson.ppf([0.05, 0.95], r.mean())  # the overall rate for every scan
    assert int(((cp.n < q05) | (cp.n > q95)).sum()) > bound
    page = write_report(run)
    assert check_references(page) >= 4
    assert "window minus its gates" in html.unescape(page.read_text(encoding="utf-8"))


def _chromium():
    for name in ("chromium", "chromium-browser"):
        exe = shutil.which(name)
        if exe:
            return exe
    return None


CHECK_SCRIPT = """
<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0 && i.naturalHeight > 0; });
  var out = document.createElement('pre');
  out.id = 'render-check';
  out.textContent = JSON.stringify({images: imgs.length, rendered: ok.length,
    widths: imgs.map(function (i) { return i.naturalWidth; })});
  document.body.appendChild(out);
});
</script>
"""


def test_report_renders_in_headless_chromium(demo_report, tmp_path):
    exe = _chromium()
    if exe is None:
        pytest.skip("chromium is not installed (Debian: apt-get install chromium; .ci/run installs it "
                    "before the tests and only this test skips if that fails)")
    page = tmp_path / "probe.html"
    page.write_text(demo_report.read_text(encoding="utf-8").replace("</body>", CHECK_SCRIPT + "</body>"),
                    encoding="utf-8")
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--no-first-run",
             "--disable-sync", "--disable-component-update", f"--user-data-dir={tmp_path / 'profile'}"]
    out = subprocess.run([exe, *flags, "--virtual-time-budget=10000", "--dump-dom", page.as_uri()],
                         capture_output=True, text=True, timeout=180)
    m = re.search(r'<pre id="render-check">(.*?)</pre>', out.stdout, re.S)
    assert m, f"no render check in chromium's DOM (exit {out.returncode}): {out.stderr[-500:]}"
    res = json.loads(m.group(1).replace("&quot;", '"'))
    assert res["images"] >= 4 and res["rendered"] == res["images"], res
    assert min(res["widths"]) > 100
    # and a screenshot of the page is not blank
    shot = tmp_path / "shot.png"
    subprocess.run([exe, *flags, f"--screenshot={shot}", "--window-size=1200,2400", demo_report.as_uri()],
                   capture_output=True, text=True, timeout=180)
    assert shot.is_file() and shot.stat().st_size > 10_000
    from matplotlib.image import imread

    img = imread(shot)
    assert img[..., :3].std() > 0.05  # not a single flat colour


def test_report_bad_input(tmp_path, capsys):
    assert main(["report", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "not a run directory" in err[0]
