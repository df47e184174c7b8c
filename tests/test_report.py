"""Tests of the HTML report: self-contained, complete, consistent with the fit, and loading in a browser."""

from __future__ import annotations

import base64
import json
import re
import shutil
import struct
import subprocess

import numpy as np
import pytest

from bayesgeo.pipeline import run_study
from bayesgeo.report import build_report

from _study_helpers import write_tiny_study

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    study = write_tiny_study(folder)
    res = run_study(study, out=folder / "run")
    return folder / "run", res


def _images(text: str) -> list[str]:
    return re.findall(r"<img [^>]*src=\"([^\"]+)\"", text)


def test_report_is_self_contained(run):
    """Every image is an embedded PNG (signature and IHDR size per the PNG specification, W3C/ISO 15948,
    from memory), and nothing is fetched: no src/href outside data: URIs and in-page anchors, no script."""
    root, res = run
    assert res["status"] == 0, res
    text = (root / "report.html").read_text(encoding="utf-8")
    imgs = _images(text)
    assert len(imgs) >= 10
    for src in imgs:
        assert src.startswith("data:image/png;base64,")
        raw = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert raw[:8] == PNG_SIGNATURE and raw[12:16] == b"IHDR"
        width, height = struct.unpack(">II", raw[16:24])
        assert width > 50 and height > 50
    for attr in re.findall(r"(?:src|href)=\"([^\"]*)\"", text):
        assert attr.startswith(("data:", "#")), attr
    assert "<script" not in text.lower() and "@import" not in text
    assert "@media print" in text


def test_report_sections_and_cautions(run):
    """All sections of issue 8 are present, with the cautions of the trade (common practice: results support
    but do not replace licensed professional judgement; follow local regulation)."""
    root, _ = run
    text = (root / "report.html").read_text(encoding="utf-8")
    for anchor in ("job", "explore", "model", "diagnostics", "posterior", "priors", "vgcheck", "maps", "compare",
                   "cautions", "repro"):
        assert f"<section id=\"{anchor}\">" in text
    assert "licensed professional" in text and "local regulator" in text
    assert "stationary" in text and "isotropic" in text
    assert "NOT CONVERGED" not in text.split("<nav>")[0]
    manifest = json.loads((root / "manifest.json").read_text())
    assert manifest["inputs"][str(root.parent / "tiny.csv")]["sha256"] in text
    assert "Area average" in text


def test_posterior_table_matches_draws(run):
    """The report's median practical range is the median of the stored draws (numpy.median reference)."""
    import xarray as xr

    root, _ = run
    with xr.open_datatree(root / "fits" / "exponential" / "posterior.nc", engine="netcdf4") as tree:
        med = float(np.median(tree["posterior"]["practical_range"].values))
    text = (root / "report.html").read_text(encoding="utf-8").split("<section id=\"posterior\">")[1]
    row = re.search(r"<td class=\"l\">practical_range</td><td class=\"\">([^<]+)</td>", text)
    assert row is not None
    assert float(row.group(1)) == pytest.approx(med, rel=1e-3)


def test_log_prior_and_likelihood_against_scipy(run):
    """The per-draw log prior and log likelihood fed to the sensitivity analysis: PC range prior as
    InverseGamma(1, lambda1) and sd priors as exponentials (Fuglstad et al. 2019; scipy.stats.invgamma/expon),
    the likelihood as scipy.stats.multivariate_normal on the log values (covariance with the model's
    documented diagonal jitter, bayesgeo.likelihood.JITTER)."""
    from scipy import stats

    from bayesgeo.covariance import get_covariance
    from bayesgeo.geometry import distance_matrix
    from bayesgeo.likelihood import JITTER
    from bayesgeo.posterior import fit_spec, load_fit
    from bayesgeo.priors import pc_range_rate, pc_sd_rate
    from bayesgeo.report_priors import _log_lik, _log_prior

    root, _ = run
    tree = load_fit(root / "fits" / "exponential")
    spec = fit_spec(tree)
    post = tree["posterior"].to_dataset().isel(draw=slice(0, 3))
    small = tree.copy()
    small["posterior"] = post
    lp = _log_prior(post, spec)
    ll = _log_lik(small, spec)
    p = spec.priors
    c, d = 1, 2
    pr, ps = (float(post[k].values[c, d]) for k in ("practical_range", "partial_sill"))
    pn = float(post["nugget"].values[c, d]) if spec.nugget else 0.0
    ref = (stats.invgamma(1.0, scale=pc_range_rate(*p.range)).logpdf(pr)
           + stats.expon(scale=1 / pc_sd_rate(*p.sd)).logpdf(np.sqrt(ps))
           + (stats.expon(scale=1 / pc_sd_rate(*p.nugget)).logpdf(np.sqrt(pn)) if spec.nugget else 0.0)
           + stats.norm(0, p.beta_sd).logpdf(post["beta_z"].values[c, d]).sum())
    assert lp[c, d] == pytest.approx(ref, rel=1e-10)
    const = tree["constant_data"]
    xy = np.column_stack([const["x"].values, const["y"].values])
    z = np.log(tree["observed_data"]["value"].values)
    cov = get_covariance("exponential")
    k = ps * cov.correlation(distance_matrix(xy), float(post["scale"].values[c, d])) + (pn + JITTER * ps) * np.eye(len(z))
    mean = const["design"].values @ post["beta"].values[c, d]
    assert ll[c, d] == pytest.approx(stats.multivariate_normal(mean, k).logpdf(z), rel=1e-8)


def test_not_converged_banner(run):
    """A failed check marks the report NOT CONVERGED at the top (issue 8 requirement)."""
    root, _ = run
    manifest = json.loads((root / "manifest.json").read_text())
    manifest["verdicts"]["check:exponential"] = "fail"
    text = build_report(root, manifest)
    top = text.split("<nav>")[0]
    assert "NOT CONVERGED" in top and "class=\"banner\"" in top


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


CHECK_SCRIPT = """<script>
window.addEventListener('error', function (e) { document.body.setAttribute('data-errors',
  (parseInt(document.body.getAttribute('data-errors') || '0') + 1).toString()); }, true);
window.addEventListener('load', function () {
  var imgs = document.images, broken = 0;
  for (var i = 0; i < imgs.length; i++) {
    if (!imgs[i].complete || imgs[i].naturalWidth === 0 || imgs[i].src.indexOf('data:image/png;base64,') !== 0) broken++;
  }
  document.body.setAttribute('data-images', imgs.length.toString());
  document.body.setAttribute('data-broken', broken.toString());
});
</script>"""


def test_report_in_browser(run, tmp_path):
    """The report loads in headless Chromium with no errors and no broken images (naturalWidth > 0, the HTML
    Living Standard's test for a decoded image), and a screenshot is taken."""
    exe = _chromium()
    if exe is None:
        pytest.skip("chromium not installed (.ci/run installs Debian's chromium)")
    root, _ = run
    text = (root / "report.html").read_text(encoding="utf-8")
    page = tmp_path / "report_check.html"
    page.write_text(text.replace("</head>", CHECK_SCRIPT + "\n</head>", 1), encoding="utf-8")
    common = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
              "--disable-background-networking", "--disable-component-update", "--disable-sync",
              f"--user-data-dir={tmp_path / 'profile'}"]
    shot = tmp_path / "report.png"
    subprocess.run([*common, f"--screenshot={shot}", "--window-size=1200,3000", (root / "report.html").as_uri()],
                   capture_output=True, timeout=180, check=False)
    assert shot.is_file() and shot.read_bytes()[:8] == PNG_SIGNATURE
    width, height = struct.unpack(">II", shot.read_bytes()[16:24])
    assert (width, height) == (1200, 3000)
    done = subprocess.run([*common, "--enable-logging=stderr", "--v=0", "--dump-dom", page.as_uri()],
                          capture_output=True, text=True, timeout=180, check=False)
    body = re.search(r"<body([^>]*)>", done.stdout)
    assert body is not None, done.stderr[-2000:]
    attrs = dict(re.findall(r"data-(\w+)=\"(\d+)\"", body.group(1)))
    n_img = len(_images(text))
    assert attrs.get("images") == str(n_img)
    assert attrs.get("broken") == "0"
    assert "errors" not in attrs
    console = [ln for ln in done.stderr.splitlines() if "CONSOLE" in ln or "Uncaught" in ln
               or "Failed to load resource" in ln or "net::ERR" in ln]
    assert console == []
    keep = root.parent / "report_screenshot.png"
    shutil.copy2(shot, keep)
