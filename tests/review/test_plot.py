"""`policyc plot`: pictures are written, non-empty, of the requested size; SVG parses; errors are clear.

The class means and covariances that the regions picture rebuilds from a rule are checked against
scikit-learn's QuadraticDiscriminantAnalysis fitted on the same training data (references.md SK-6:
in 1.9.1 its covariances are the maximum-likelihood ones, divisor n).
"""

from __future__ import annotations

import csv
import struct
import sys
import xml.etree.ElementTree as ElementTree
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from policyc.cli import main
from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy
from policyc.review.plot import PlotError, parse_size, simplex_map
from policyc.review.shared.gaussians import gaussian_moments
from policyc.review.shared.loading import load_rule_or_policy

ROOT = Path(__file__).resolve().parents[2]
PACKHOUSE = ROOT / "policies-demo" / "packhouse"
CLAIMS = ROOT / "policies-demo" / "claims"


@pytest.fixture(scope="module")
def rules(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("plot-rules")
    paths = {}
    for name, policy in [
        ("r3", PACKHOUSE / "policy.yaml"),
        ("r4", PACKHOUSE / "policy-r4.yaml"),
        ("claims", CLAIMS / "policy.yaml"),
    ]:
        paths[name] = folder / f"{name}.rule"
        write_artefact(compile_policy(policy).rule, paths[name])
    return paths


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from the PNG header (IHDR chunk, big-endian, bytes 16-24)."""
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", data[16:24])
    return int(width), int(height)


def run(*args: object) -> tuple[int, str]:
    result = CliRunner().invoke(main, [str(a) for a in args])
    return result.exit_code, result.output


def test_regions_png_has_the_requested_size_and_opens(rules: dict[str, Path], tmp_path: Path) -> None:
    picture = tmp_path / "regions.png"
    code, output = run(
        "plot", "regions", rules["r3"], "--x", "firmness_n", "--y", "brix", "--hold", "mass_g=200",
        "--points", PACKHOUSE / "train.csv", "--label", "grade", "--size", "640x480px", "-o", picture,
    )  # fmt: skip
    assert code == 0, output
    assert png_size(picture) == (640, 480)
    import matplotlib.image

    pixels = matplotlib.image.imread(picture)
    assert pixels.shape[:2] == (480, 640) and float(pixels[..., :3].std()) > 0.05  # not blank


def test_simplex_comparison_png_and_svg(rules: dict[str, Path], tmp_path: Path) -> None:
    png, svg = tmp_path / "simplex.png", tmp_path / "simplex.svg"
    code, output = run("plot", "simplex", rules["r4"], "--compare", PACKHOUSE / "policy.yaml", "-o", png)
    assert code == 0, output
    assert png_size(png) == (800, 600)  # the default 8 x 6 inches at 100 pixels per inch
    code, output = run("plot", "simplex", rules["r3"], "--size", "5x5", "-o", svg)
    assert code == 0, output
    root = ElementTree.parse(svg).getroot()
    assert root.tag.endswith("svg") and root.attrib["width"].startswith("360")  # 5 inches = 360 pt
    assert "P(premium) = 1" in svg.read_text(encoding="utf-8")


def test_curve_picture(rules: dict[str, Path], tmp_path: Path) -> None:
    picture = tmp_path / "curve.png"
    code, output = run("plot", "curve", rules["claims"], CLAIMS / "holdout.csv", "--label", "outcome", "-o", picture)
    assert code == 0, output
    assert png_size(picture) == (800, 600) and picture.stat().st_size > 10_000


def test_rebuilt_moments_match_scikit_learn_qda(rules: dict[str, Path]) -> None:
    from sklearn.discriminant_analysis import QuadraticDiscriminantAnalysis

    rule = load_rule_or_policy(rules["r3"]).rule
    with (PACKHOUSE / "train.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    X = np.array([[float(row[f]) for f in rule.features] for row in rows])
    y = np.array([row["grade"] for row in rows])
    qda = QuadraticDiscriminantAnalysis(store_covariance=True).fit(X, y)
    order = [list(qda.classes_).index(name) for name in rule.classes]
    means, covariances = gaussian_moments(rule)
    # scikit-learn 1.9.1 QDA: class means and ML covariances (references.md SK-6)
    assert np.allclose(means, qda.means_[order], rtol=1e-10, atol=0)
    assert np.allclose(covariances, np.array(qda.covariance_)[order], rtol=1e-8, atol=0)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["regions", "{claims}", "--x", "p_legitimate", "--y", "p_fraudulent"], "need gaussian"),
        (["regions", "{r3}", "--x", "firmness_n", "--y", "colour"], "'colour' is not a feature"),
        (["simplex", "{claims}"], "needs exactly three classes"),
        (["simplex", "{r3}", "--compare", "{claims}"], "classes differ"),
    ],
)
def test_pictures_that_cannot_be_drawn_exit_1(
    rules: dict[str, Path], tmp_path: Path, args: list[str], message: str
) -> None:
    code, output = run("plot", *(a.format(**rules) for a in args), "-o", tmp_path / "x.png")
    assert code == 1 and message in output
    assert not (tmp_path / "x.png").exists()


@pytest.mark.parametrize("args", [["--size", "big"], ["--hold", "mass_g"], ["-o", "x.png", "--points", "p.csv"]])
def test_usage_errors_exit_2(rules: dict[str, Path], tmp_path: Path, args: list[str]) -> None:
    base = ["plot", "regions", rules["r3"], "--x", "firmness_n", "--y", "brix"]
    output = [] if "-o" in args else ["-o", tmp_path / "x.png"]
    code, _ = run(*base, *output, *args)
    assert code == 2


def test_sizes_parse_in_inches_and_pixels() -> None:
    assert parse_size("8x6").pixels == (800, 600)
    assert parse_size("1200x900px").pixels == (1200, 900)
    with pytest.raises(PlotError, match="WxH"):
        parse_size("8 by 6")


def test_missing_matplotlib_gives_a_clear_error(
    rules: dict[str, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib now raises ImportError
    with pytest.raises(PlotError, match=r"pip install 'policyc\[plot\]'"):
        simplex_map(load_rule_or_policy(rules["r3"]), tmp_path / "x.png")
