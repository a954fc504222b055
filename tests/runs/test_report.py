"""report.html: written by every run, self-contained, and faithful to the run's own files."""

from __future__ import annotations

import base64
import io
import json
import shutil
import struct
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
import yaml
from PIL import Image

import towers
from towers import config as C
from towers.cli import main as cli
from towers.errors import TowersError
from towers.evaluation.protocol import SLICES
from towers.runs.report import effective_rank, energy_rank, pca_2d, singular_values

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # reference: PNG specification (ISO/IEC 15948), section 5.2
N_IMAGES = 3  # training curves, spectrum, item map


@pytest.fixture(scope="module")
def run_dir(tiny_runs) -> Path:
    """The tiny run, with the oracle and the report's default anchors and neighbours."""
    return tiny_runs.train()


def _report_settings(run_dir: Path) -> dict:
    return yaml.safe_load((run_dir / "config.yaml").read_text())["report"]


class _Page(HTMLParser):
    """Collects images, links, scripts and the report's tables from the page (stdlib html.parser)."""

    def __init__(self):
        super().__init__()
        self.srcs, self.hrefs, self.scripts, self.tables = [], [], 0, []
        self._row = self._cell = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "src" in a:
            self.srcs.append(a["src"])
        if "href" in a:
            self.hrefs.append(a["href"])
        if tag == "script":
            self.scripts += 1
        if tag == "table":
            self.tables.append({"attrs": a, "rows": []})
        elif tag == "tr" and self.tables:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[-1]["rows"].append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    return page


def _tables(page: _Page, css: str) -> list[dict]:
    return [t for t in page.tables if t["attrs"].get("class") == css]


def test_every_run_writes_a_self_contained_page(run_dir):
    page = _parse(run_dir / "report.html")
    assert len(page.srcs) == N_IMAGES
    assert all(s.startswith("data:image/png;base64,") for s in page.srcs)  # nothing fetched from elsewhere
    assert page.hrefs and all(h.startswith("#") for h in page.hrefs)  # only links within the page
    assert page.scripts == 0
    assert not (run_dir.parent / "run.partial").exists()


def test_embedded_images_are_pngs_that_decode(run_dir):
    for src in _parse(run_dir / "report.html").srcs:
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data[:8] == PNG_SIGNATURE
        # reference: PNG specification, IHDR is the first chunk: length, b"IHDR", width, height (big-endian)
        length, kind, width, height = struct.unpack(">I4sII", data[8:24])
        assert kind == b"IHDR" and width > 0 and height > 0
        img = Image.open(io.BytesIO(data))  # reference: Pillow's PNG decoder
        img.load()
        assert img.size == (width, height)


def test_metrics_tables_hold_the_values_of_metrics_json(run_dir):
    metrics = json.loads((run_dir / "metrics.json").read_text())
    tables = {t["attrs"]["data-slice"]: t for t in _tables(_parse(run_dir / "report.html"), "metrics")}
    assert set(tables) == {s for s in metrics if s in SLICES} == {"warm", "cold"}
    for slice_name in tables:
        models = metrics[slice_name]
        head, *rows = tables[slice_name]["rows"]
        shown = {r[0]: dict(zip(head[1:], r[1:])) for r in rows}
        expected = {"popularity", "linear_factor", "towers", "oracle"} | ({"ease", "item_knn"} if slice_name == "warm" else set())
        assert set(shown) == set(models) == expected
        for model, values in models.items():
            for metric, value in values.items():
                if metric == "queries":
                    continue
                assert float(shown[model][metric]) == pytest.approx(value, abs=5e-5), (slice_name, model, metric)


def _random_orthonormal(rng, n: int, r: int) -> np.ndarray:
    q, _ = np.linalg.qr(rng.standard_normal((n, r)))
    return q


def test_effective_rank_of_a_matrix_with_known_rank():
    rng = np.random.default_rng(3)
    n, k, r = 60, 12, 5
    u, v = _random_orthonormal(rng, n, r), _random_orthonormal(rng, k, r)
    equal = u @ np.diag(np.full(r, 2.5)) @ v.T
    assert np.linalg.matrix_rank(equal) == r  # reference: numpy
    # Roy & Vetterli (2007), "The effective rank": r equal non-zero singular values give exactly r
    assert effective_rank(singular_values(torch.from_numpy(equal))) == pytest.approx(r, rel=1e-9)
    s = np.array([5.0, 3.0, 1.5, 0.7, 0.2])
    a = u @ np.diag(s) @ v.T
    sv_np = np.linalg.svd(a, compute_uv=False)  # reference: numpy's SVD
    p = sv_np[sv_np > 1e-12] / sv_np.sum()
    expected = float(np.exp(-(p * np.log(p)).sum()))  # Roy & Vetterli (2007), definition: exp of the entropy
    got = effective_rank(singular_values(torch.from_numpy(a)))
    assert got == pytest.approx(expected, rel=1e-9)
    assert 1.0 <= got <= r  # Roy & Vetterli (2007): 1 <= erank <= rank
    energy = np.cumsum(sv_np ** 2) / (sv_np ** 2).sum()
    assert energy_rank(torch.from_numpy(sv_np)) == int(np.argmax(energy >= 0.9)) + 1  # brute force with numpy
    # 5^2 + 3^2 = 34 of 37.78 (90.0% is 34.0): two values reach 90% of the energy, by hand
    assert energy_rank(torch.tensor(s)) == 2
    assert effective_rank(torch.zeros(4)) == 0.0


def test_pca_projection_matches_scikit_learn():
    from sklearn.decomposition import PCA

    x = np.random.default_rng(5).standard_normal((80, 6)) @ np.diag([4, 2, 1, 0.5, 0.2, 0.1])
    coords, shares = pca_2d(torch.from_numpy(x))
    ref = PCA(n_components=2).fit(x)  # reference: scikit-learn's PCA
    z = ref.transform(x)
    for j in range(2):  # each axis is defined up to its sign
        assert min(np.abs(coords[:, j].numpy() - z[:, j]).max(), np.abs(coords[:, j].numpy() + z[:, j]).max()) < 1e-8
    assert shares == pytest.approx(ref.explained_variance_ratio_.tolist(), rel=1e-9)


def _neighbour_tables(page: _Page) -> list[tuple[str, list[list[str]], list[str]]]:
    return [(t["attrs"]["data-anchor"], t["rows"][1:], t["rows"][0]) for t in _tables(page, "neighbours")]


def test_neighbour_lists_are_what_similar_returns_for_the_most_popular_items(run_dir):
    run = towers.load(run_dir)
    shown = _report_settings(run_dir)
    assert shown["anchors"] >= 2 and shown["neighbours"] >= 2  # lists and orders worth checking
    pairs = torch.load(run_dir / "pairs.pt", weights_only=True)
    counts = np.bincount(pairs["train"]["candidate"].numpy(), minlength=len(pairs["item_ids"]))
    # brute force with numpy
    popular = [pairs["item_ids"][i] for i in np.argsort(-counts, kind="stable")[:shown["anchors"]]]
    tables = _neighbour_tables(_parse(run_dir / "report.html"))
    assert [a for a, _, _ in tables] == popular
    expected = run.similar(popular, top=shown["neighbours"])
    items = pd.read_parquet(yaml.safe_load((run_dir / "config.yaml").read_text())["items"]["path"]).set_index("item_id")
    for anchor, rows, head in tables:
        assert rows[0][0] == "anchor" and rows[0][1] == anchor
        want = expected[expected["query_id"] == anchor]
        assert len(rows) == 1 + shown["neighbours"]
        assert [int(r[0]) for r in rows[1:]] == want["rank"].tolist()
        assert [r[1] for r in rows[1:]] == want["item_id"].tolist()
        assert [float(r[2]) for r in rows[1:]] == pytest.approx(want["score"].tolist(), abs=5e-5)
        # the attributes are the item table's own columns (vector columns left out)
        assert "description_vector" not in head and {"name", "department", "brand"} <= set(head)
        for r in rows:
            assert r[head.index("name")] == items.loc[r[1], "name"]
            assert r[head.index("department")] == items.loc[r[1], "department"]


@pytest.mark.slow
def test_report_command_uses_named_anchors_and_skips_unknown_ones(run_dir, tmp_path, capsys):
    copy = tmp_path / "run"
    shutil.copytree(run_dir, copy)
    cfg = yaml.safe_load((copy / "config.yaml").read_text())
    known = towers.load(copy).embeddings("item")[0][7]
    cfg["report"].update(anchor_ids=[known, "NO-SUCH-ITEM"], color_feature="brand")
    (copy / "config.yaml").write_text(yaml.safe_dump(cfg))
    (copy / "report.html").unlink()
    assert cli(["report", str(copy)]) == 0
    err = capsys.readouterr().err
    assert "warning: report.anchor_ids: 'NO-SUCH-ITEM' skipped" in err and "unknown item id" in err
    page = _parse(copy / "report.html")
    assert [a for a, _, _ in _neighbour_tables(page)] == [known]
    assert len(page.srcs) == N_IMAGES
    assert "coloured by <code>brand</code>" in (copy / "report.html").read_text()


def test_report_command_refuses_a_folder_that_is_no_run(tmp_path, capsys):
    assert cli(["report", str(tmp_path)]) == 2
    assert "not a run folder" in capsys.readouterr().err


@pytest.mark.parametrize("report, message", [
    ({"color_feature": "price"}, r"config key 'report.color_feature': got 'price'; expected one of the categorical "
                                 r"item features \(department, brand\)"),
    ({"anchor_ids": [True]}, r"config key 'report.anchor_ids': got \[True\]; expected a list of ids"),
    ({"neighbours": 0}, r"config key 'report.neighbours': got 0; expected a number >= 1"),
    ({"colour": "brand"}, r"config key 'report.colour' is unknown"),
])
def test_report_keys_are_checked(tiny_runs, tmp_path, report, message):
    cfg = tiny_runs.settings(report=report)
    with pytest.raises(TowersError, match=message):
        C.resolve(cfg, tmp_path)


def test_a_last_epoch_best_is_marked_in_the_run_table(run_dir):
    history = json.loads((run_dir / "history.json").read_text())
    towers_epochs = history["epochs"]["towers"]
    last_best = history["best_epoch"] == towers_epochs[-1]["epoch"] and "valid_recall@20" in towers_epochs[-1]
    assert history["still_improving"] == last_best
    summary = _tables(_parse(run_dir / "report.html"), "summary")[0]
    shown = " ".join(" ".join(r) for r in summary["rows"])
    assert ("still improving at the last epoch" in shown) == last_best
    metrics = json.loads((run_dir / "metrics.json").read_text())
    assert ("towers_training" in metrics.get("notes", {})) == last_best
