"""report.html: one self-contained page per run, for judging a trained model by eye.

It shows the training curves, the metrics table, the singular-value spectrum of the item embeddings
with their effective rank, a 2-D map of the items and nearest-neighbour lists with the items' own
attributes. Every image is a PNG embedded as a base64 data URI, so the page needs no network, no
other file and no JavaScript. Everything is read back from the run folder, so the page written at
the end of `towers train` and the one `towers report` rewrites later are the same.
"""

from __future__ import annotations

import base64
import html
import io
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import torch

from towers.atomic import write_text_atomic
from towers.config import lower_is_better
from towers.data.tables import normalise_ids, read_table, table_rows
from towers.errors import TowersError, plain
from towers.evaluation.protocol import SLICES
from towers.runs.folder import LINEAR_FACTOR, RunFolder
from towers.runs.run import Run

REPORT_NAME = RunFolder.REPORT
ENERGY_SHARE = 0.9
MAX_COLOURS = 9  # the most frequent categories get a colour each; the rest are drawn grey as "other"
MODEL_COLOURS = {"towers": "#1f77b4", "linear_factor": "#ff7f0e"}


# ---- spectrum and projection (pure functions of tensors) ---------------------------------------------
def singular_values(vectors: torch.Tensor) -> torch.Tensor:
    """Singular values of the (n, k) embedding matrix as it is used for scoring (not centred), descending."""
    return torch.linalg.svdvals(vectors.double())


def effective_rank(sv: torch.Tensor) -> float:
    """Entropy effective rank of Roy & Vetterli (2007): exp(H(p)) with p_i = s_i / sum(s).

    It lies between 1 and the number of non-zero singular values, and equals r for a matrix whose r
    non-zero singular values are equal. 0 log 0 counts as 0; an all-zero matrix has effective rank 0.
    """
    s = sv.double().clamp(min=0)
    total = s.sum()
    if total <= 0:
        return 0.0
    p = s / total
    h = -(p[p > 0] * p[p > 0].log()).sum()
    return float(h.exp())


def energy_rank(sv: torch.Tensor, share: float = ENERGY_SHARE) -> int:
    """The fewest leading singular values whose squares hold `share` of the total sum of squares."""
    e = sv.double().pow(2)
    total = e.sum()
    if total <= 0:
        return 0
    cum = torch.cumsum(e, 0) / total
    # a relative slack keeps an exact share (e.g. 0.9 of 10 equal values) from failing on rounding
    return int(torch.searchsorted(cum, torch.tensor([share - 1e-12], dtype=cum.dtype)).item()) + 1


def pca_2d(vectors: torch.Tensor) -> tuple[torch.Tensor, list[float]]:
    """(n, 2) coordinates on the first two principal axes of the centred vectors, and their variance shares."""
    x = vectors.double()
    x = x - x.mean(0, keepdim=True)
    u, s, _ = torch.linalg.svd(x, full_matrices=False)
    var = s.pow(2)
    shares = (var / var.sum()).tolist() if var.sum() > 0 else [0.0] * len(var)
    coords = u[:, :2] * s[:2]
    if coords.shape[1] < 2:  # k = 1: a flat second axis
        coords = torch.cat([coords, torch.zeros(len(coords), 2 - coords.shape[1], dtype=coords.dtype)], 1)
        shares = shares + [0.0]
    return coords, shares[:2]


def popular_items(pairs: dict, n: int) -> np.ndarray:
    """Catalog rows of the n items with the most training pairs (both columns in item_item runs), ties by row."""
    train = pairs["train"]
    counts = torch.bincount(train["candidate"], minlength=len(pairs["item_ids"]))
    if pairs["item_item"]:
        counts = counts + torch.bincount(train["query"], minlength=len(pairs["item_ids"]))
    order = torch.argsort(-counts, stable=True)
    return order[:n].numpy()


# ---- the page ------------------------------------------------------------------------------------
def write_report(run_dir: str | Path) -> Path:
    """Write RUN_DIR/report.html from the run folder's files; returns its path."""
    run = Run(run_dir)
    if run.config is None:
        raise TowersError(f"{run.dir}: config.yaml is missing; the run folder is incomplete, so no report can be written")
    for name in (RunFolder.METRICS, RunFolder.HISTORY):
        if not (run.dir / name).is_file():
            raise TowersError(f"{run.dir / name}: missing; the run folder is incomplete (retrain the run)")
    page = _Page(run)
    return write_text_atomic(run.dir / REPORT_NAME, page.render())


class _Page:
    """Gathers what the report shows, then renders it as one HTML string."""

    def __init__(self, run):
        self.run = run
        self.cfg = run.config
        self.rcfg = run.config.report
        self.notes: list[str] = []
        self.metrics = run.folder.read_json(RunFolder.METRICS)
        self.history = run.folder.read_json(RunFolder.HISTORY)
        self.item_ids, self.item_vectors, _, _ = run.embeddings("item")
        self.models = {"towers": self.item_vectors}
        if run.folder.has_model(LINEAR_FACTOR):
            self.models[LINEAR_FACTOR] = run.embeddings("item", LINEAR_FACTOR)[1]
        self.attributes = self._attributes()

    def note(self, text: str) -> None:
        self.notes.append(text)
        warnings.warn(text, stacklevel=2)

    # ---- inputs ----
    def _attributes(self) -> pd.DataFrame | None:
        """The raw item feature table, one row per catalog item (missing rows empty), vector columns dropped."""
        items = self.cfg.items
        if not items.path:
            return None
        try:
            table = read_table(items.path)
        except TowersError as exc:
            self.note(f"item attributes left out: {exc}")
            return None
        if items.id_column not in table.columns:
            self.note(f"item attributes left out: {items.path} has no column '{items.id_column}'")
            return None
        rows = table_rows(normalise_ids(table[items.id_column], items.path, items.id_column), self.item_ids)
        keep = [c for c in table.columns if c != items.id_column and not _is_vector_column(table[c])]
        out = table[keep].iloc[np.where(rows >= 0, rows, 0)].reset_index(drop=True)
        if (rows < 0).any():  # catalog items without a table row (missing_rows: default) show empty cells
            out = out.astype(object)
            out.loc[rows < 0, :] = None
        return out

    def _colour_feature(self) -> str | None:
        named = self.rcfg.color_feature
        if named:
            return named
        for f in self.cfg.items.features:
            if f.kind == "categorical":
                return f.name
        return None

    def anchors(self) -> list:
        """The anchor item ids: report.anchor_ids (unknown ones noted and skipped), or the most popular items."""
        wanted = self.rcfg.anchor_ids
        if not wanted:
            rows = popular_items(self.run.pairs, self.rcfg.anchors)
            return [plain(v) for v in self.item_ids[rows]]
        found = []
        for a in pd.unique(pd.Series(wanted, dtype=object)):
            try:
                self.run.similar([a], 1)
            except TowersError as exc:
                self.note(f"report.anchor_ids: {a!r} skipped ({exc})")
                continue
            found.append(a)
        return found

    # ---- sections ----
    def render(self) -> str:
        sections = [self._summary(), self._metrics_section(), self._curves_section(), self._spectrum_section(),
                    self._map_section(), self._neighbours_section()]
        notes = "".join(f"<li>{_e(n)}</li>" for n in self.notes)
        folder = self.run.dir.resolve()
        folder = RunFolder(folder).final_path  # written just before the run folder gets its final name
        title = f"towers run report: {folder.name}"
        toc = "".join(f'<li><a href="#{key}">{_e(label)}</a></li>' for key, label in _SECTIONS)
        return (f"<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<title>{_e(title)}</title>\n"
                f"<style>{_CSS}</style>\n</head>\n<body>\n<h1>{_e(title)}</h1>\n"
                f"<p class=\"muted\">{_e(str(folder))}</p>\n"
                + (f"<div class=\"notes\"><b>Notes</b><ul>{notes}</ul></div>\n" if notes else "")
                + f"<ul class=\"toc\">{toc}</ul>\n" + "\n".join(sections) + "\n</body>\n</html>\n")

    def _summary(self) -> str:
        c, p = self.cfg, self.run.pairs
        towers_hist = self.history["epochs"].get("towers", [])
        loss = c.training.loss
        rows = [
            ("mode", c.run.mode),
            ("loss", loss + (f", {c.training.sampled_negatives} negatives per positive" if loss == "logistic" else "")),
            ("k (model.dim)", c.model.dim),
            ("hidden layers", list(c.model.hidden) or "none (linear map)"),
            ("training.weight_decay / training.id_l2", f"{c.training.weight_decay:g} / {c.training.id_l2:g}"),
            ("epochs run (best)", f"{len(towers_hist)} ({self.history.get('best_epoch')}) by validation "
                                  f"{self.history.get('stop_metric')}"
                                  + ("; still improving at the last epoch: more epochs may help"
                                     if self.history.get("still_improving") else "")),
            ("items / queries", f"{len(p['item_ids']):,} / {len(p['query_ids']):,}"),
            ("pairs: training / validation / test / cold", " / ".join(
                f"{len(p[s]['query']):,}" for s in ("train", "valid", "test", "cold_test"))),
        ]
        if len(p.get("cold_user_test", {}).get("query", ())):  # pairs files before the cold-user slice lack it
            rows.append(("pairs: cold users", f"{len(p['cold_user_test']['query']):,}"))
        body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(str(v))}</td></tr>" for k, v in rows)
        return f'<h2 id="summary">Run</h2>\n<table class="summary">{body}</table>'

    def _metrics_section(self) -> str:
        out = ['<h2 id="metrics">Held-out metrics</h2>',
               '<p class="how">The same numbers as <code>metrics.json</code>, on the test pairs (warm: items with '
               'training pairs, ranked against every such item), on the cold slice (items held out whole, ranked '
               'among themselves) and on the cold_users slice (users held out whole, ranked over the warm items). '
               'Bold marks the best model in each column (EASE and item-kNN are '
               'references scored on the warm slice, each with its setting chosen on the validation pairs); '
               'the oracle row scores the true vectors of generated data, a ceiling rather than a competitor. '
               'Higher is better except for rmse and mae.</p>']
        notes = self.metrics.get("notes", {})
        for slice_name in [s for s in SLICES if s in self.metrics]:
            models = self.metrics[slice_name]
            names = [m for m in models if models[m]]
            if not names:
                out.append(f'<h3>{_e(slice_name)}</h3><p class="how">{_e(notes.get(slice_name, "nothing to score"))}</p>')
                continue
            cols = [k for k in models[names[0]] if k != "queries"]
            queries = models[names[0]].get("queries")
            best = {}  # column -> the models that share its best value (ties all bold)
            for col in cols:
                vals = {m: models[m].get(col) for m in names if m != "oracle"}
                finite = {m: v for m, v in vals.items() if isinstance(v, (int, float)) and math.isfinite(v)}
                if finite:
                    top = (min if lower_is_better(col) else max)(finite.values())
                    best[col] = {m for m, v in finite.items() if v == top}
            head = "".join(f"<th>{_e(c)}</th>" for c in cols)
            body = "".join(
                f'<tr><th>{_e(m)}</th>' + "".join(
                    f'<td class="num" data-metric="{_e(c)}">' + (f"<b>{_fmt(models[m].get(c))}</b>" if m in best.get(c, ())
                                                                 else _fmt(models[m].get(c))) + "</td>"
                    for c in cols) + "</tr>" for m in names)
            caption = f"{slice_name}" + (f" ({queries:,} queries)" if isinstance(queries, int) else "")
            out.append(f'<table class="metrics" data-slice="{_e(slice_name)}"><caption>{_e(caption)}</caption>'
                       f"<tr><th>model</th>{head}</tr>{body}</table>")
        return "\n".join(out)

    def _curves_section(self) -> str:
        epochs = self.history["epochs"]
        metric = self.history.get("stop_metric") or ""
        key = f"valid_{metric}"
        has_valid = any(key in row for rows in epochs.values() for row in rows)
        fig, axes = _figure(10, 3.6, 2 if has_valid else 1)
        ax_loss = axes[0]
        for name, rows in epochs.items():
            if not rows:
                continue
            colour = MODEL_COLOURS.get(name)
            ep = [r["epoch"] for r in rows]
            ax_loss.plot(ep, [r["loss"] for r in rows], "o-", ms=3, label=name, color=colour)
            if has_valid:
                vals = [(r["epoch"], r[key]) for r in rows if key in r]
                if vals:
                    x, y = zip(*vals)
                    axes[1].plot(x, y, "o-", ms=3, label=name, color=colour)
                    pick = (min if lower_is_better(metric) else max)(range(len(y)), key=lambda i: y[i])
                    axes[1].plot([x[pick]], [y[pick]], marker="*", ms=13, color=colour, ls="none")
        ax_loss.set(title="training objective per epoch", xlabel="epoch", ylabel="mean minibatch loss")
        ax_loss.legend(frameon=False)
        if has_valid:
            axes[1].set(title=f"validation {metric} (star: best epoch)", xlabel="epoch", ylabel=metric)
            axes[1].legend(frameon=False)
        for ax in axes:
            ax.xaxis.get_major_locator().set_params(integer=True)
            ax.grid(alpha=0.3)
        best = self.history.get("best_epoch")
        how = ("<p class=\"how\">Left: the mean minibatch objective (loss plus penalties) of each epoch; it should "
               "fall and flatten. Right: the early-stopping metric on the validation pairs after each epoch; the "
               f"star marks the epoch whose weights were kept (towers: epoch {best}). A validation curve that peaks "
               "early and falls while the loss keeps falling is overfitting: raise the penalties or lower k.</p>")
        if not has_valid:
            how = "<p class=\"how\">There were no validation pairs, so only the objective is shown; the last epoch was kept.</p>"
        return f'<h2 id="curves">Training curves</h2>\n{how}\n{_img(fig, "training curves")}'

    def _spectrum_section(self) -> str:
        fig, (ax_s, ax_e) = _figure(10, 3.6, 2)
        rows = []
        for name, vecs in self.models.items():
            sv = singular_values(vecs)
            colour = MODEL_COLOURS.get(name)
            idx = np.arange(1, len(sv) + 1)
            top = float(sv[0]) if len(sv) and sv[0] > 0 else 1.0
            rel = (sv / top).numpy()
            ax_s.semilogy(idx, np.maximum(rel, 1e-8), "o-", ms=3, label=name, color=colour)
            energy = (torch.cumsum(sv.pow(2), 0) / sv.pow(2).sum().clamp(min=1e-300)).numpy()
            ax_e.plot(idx, energy, "o-", ms=3, label=name, color=colour)
            r90 = energy_rank(sv)
            ax_e.axvline(r90, color=colour, ls=":", lw=1)
            rows.append((name, vecs.shape[1], effective_rank(sv), r90, float(sv[0]) if len(sv) else 0.0))
        ax_s.set(title="singular values / largest", xlabel="index i", ylabel="s_i / s_1 (log scale)")
        ax_e.axhline(ENERGY_SHARE, color="grey", ls="--", lw=1)
        ax_e.set(title=f"cumulative energy (dotted: {ENERGY_SHARE:.0%} reached)", xlabel="number of singular values",
                 ylabel="share of sum of s_i^2", ylim=(0, 1.02))
        for ax, corner in ((ax_s, "upper right"), (ax_e, "lower right")):  # corners the curves leave free
            ax.xaxis.get_major_locator().set_params(integer=True)
            ax.grid(alpha=0.3)
            ax.legend(frameon=False, loc=corner)
        body = "".join(f"<tr><th>{_e(n)}</th><td class=\"num\">{k}</td><td class=\"num\" data-erank=\"{er:.6f}\">{er:.2f}</td>"
                       f"<td class=\"num\">{r90}</td><td class=\"num\">{s1:.4g}</td></tr>" for n, k, er, r90, s1 in rows)
        table = ("<table class=\"spectrum\"><tr><th>model</th><th>k</th><th>effective rank</th>"
                 f"<th>values for {ENERGY_SHARE:.0%} energy</th><th>largest s</th></tr>{body}</table>")
        how = ("<p class=\"how\">Singular values s_1 &ge; s_2 &ge; &hellip; of the matrix of all item vectors (one row "
               "per catalog item, not centred, as they enter the dot product). <b>Effective rank</b> is the entropy "
               "effective rank of Roy &amp; Vetterli (2007), exp(&minus;&sum; p_i log p_i) with p_i = s_i / &sum; s_j: "
               "it equals r when r singular values are equal and the rest zero. <b>Values for 90% energy</b> is the "
               "fewest leading s_i whose squares hold 90% of &sum; s_i&sup2;. If both are far below k, the model uses "
               "few of its dimensions and a smaller k would likely do as well; a spectrum that stays flat up to k "
               "suggests k itself is the limit (compare runs with <code>towers sweep</code>).</p>")
        return f'<h2 id="spectrum">Spectrum of the item embeddings</h2>\n{how}\n{table}\n{_img(fig, "singular values")}'

    def _map_section(self) -> str:
        n = len(self.item_ids)
        coords, shares = pca_2d(self.item_vectors)
        show = np.arange(n)
        if n > self.rcfg.map_items:
            g = torch.Generator().manual_seed(self.cfg.run.seed)
            show = torch.randperm(n, generator=g)[: self.rcfg.map_items].sort().values.numpy()
        xy = coords.numpy()[show]
        cold = ~self.run.pairs["warm_items"].numpy()[show]
        feature = self._colour_feature()
        fig, (ax,) = _figure(8.5, 6.5, 1)
        dot, cross = (14, 22) if len(show) <= 2000 else (5, 10)
        if feature is not None and self.attributes is not None and feature in self.attributes.columns:
            values = self.attributes[feature].iloc[show].map(lambda v: "(missing)" if _missing(v) else str(v))
            order = values.value_counts().index.tolist()
            named = order[:MAX_COLOURS] if len(order) > MAX_COLOURS + 1 else order
            groups = [(v, values.to_numpy() == v) for v in named]
            if len(named) < len(order):
                groups.append((f"other ({len(order) - len(named)} values)", ~values.isin(named).to_numpy()))
            palette = [f"C{i}" for i in range(10)]
            for i, (label, mask) in enumerate(groups):
                colour = "#999999" if label.startswith("other (") else palette[i % 10]
                ax.scatter(xy[mask & ~cold, 0], xy[mask & ~cold, 1], s=dot, alpha=0.6, color=colour, label=label, lw=0)
                if (mask & cold).any():
                    ax.scatter(xy[mask & cold, 0], xy[mask & cold, 1], s=cross, alpha=0.8, color=colour, marker="x", lw=0.8)
            colour_note = f"coloured by <code>{_e(feature)}</code>"
        else:
            ax.scatter(xy[~cold, 0], xy[~cold, 1], s=dot, alpha=0.6, lw=0, label="items")
            if cold.any():
                ax.scatter(xy[cold, 0], xy[cold, 1], s=cross, alpha=0.8, marker="x", lw=0.8, color="C0")
            colour_note = "in one colour (the run has no categorical item feature to colour by)"
        if cold.any():
            ax.scatter([], [], s=cross, marker="x", color="black", label="held-out (cold) items", lw=0.8)
        ax.legend(frameon=False, fontsize=8, markerscale=1.5, loc="center left", bbox_to_anchor=(1.0, 0.5))
        ax.set(title="item embeddings, first two principal axes",
               xlabel=f"PC1 ({shares[0]:.0%} of variance)", ylabel=f"PC2 ({shares[1]:.0%} of variance)")
        ax.grid(alpha=0.3)
        subset = f" A random {len(show):,} of the {n:,} items are drawn." if len(show) < n else ""
        how = (f"<p class=\"how\">Every item's towers vector projected onto the two directions of largest variance "
               f"(principal component analysis of the centred vectors), {colour_note}; crosses are items held out "
               f"whole for the cold slice, placed by their features alone.{subset} Items the model treats alike lie "
               "close together. Clusters that follow the colours mean the model has learned that attribute. The two "
               "axes hold only the share of the variance given in their labels, so items far apart in the full k "
               "dimensions can still overlap here.</p>")
        return f'<h2 id="map">Item map</h2>\n{how}\n{_img(fig, "item map")}'

    def _neighbours_section(self) -> str:
        anchors = self.anchors()
        top = self.rcfg.neighbours
        kind = ("the trained pair score (this is an item_item run: the &ldquo;bought together&rdquo; list)"
                if self.run.item_item else "the cosine similarity of the item vectors (biases left out)")
        how = (f"<p class=\"how\">For each anchor item, the {top} items with the highest score by {kind}, exactly as "
               f"<code>towers similar</code> lists them, with the columns of the item table (vector columns left "
               "out). Anchors are " + ("the ids in <code>report.anchor_ids</code>." if self.rcfg.anchor_ids else
                                        "the items with the most training pairs.")
               + " Neighbours that share the anchor's kind of use make sense; a list of unrelated best-sellers "
               "suggests the vectors carry mostly popularity.</p>")
        if not anchors:
            return f'<h2 id="neighbours">Nearest neighbours</h2>\n{how}\n<p>No anchor items to show.</p>'
        frame = self.run.similar(anchors, top)
        rows_of = pd.Index(self.item_ids)
        columns = list(self.attributes.columns) if self.attributes is not None else []
        blocks = []
        for anchor, group in frame.groupby("query_id", sort=False):
            anchor_row = rows_of.get_indexer([anchor])[0]  # ids in the frame are catalog ids already
            nb_rows = rows_of.get_indexer(group["item_id"].to_numpy())
            head = "<tr><th>rank</th><th>item</th><th>score</th>" + "".join(f"<th>{_e(str(c))}</th>" for c in columns) + "</tr>"
            lines = [self._item_row("anchor", anchor, None, anchor_row, columns, "anchor")]
            lines += [self._item_row(str(r), i, s, row, columns, "") for r, i, s, row in
                      zip(group["rank"], group["item_id"], group["score"], nb_rows)]
            blocks.append(f'<table class="neighbours" data-anchor="{_e(str(anchor))}">{head}{"".join(lines)}</table>')
        return f'<h2 id="neighbours">Nearest neighbours</h2>\n{how}\n' + "\n".join(blocks)

    def _item_row(self, rank: str, item, score, row: int, columns: list, css: str) -> str:
        cells = [f'<td class="rank">{_e(rank)}</td>', f'<td class="id">{_e(str(plain(item)))}</td>',
                 f'<td class="num">{"" if score is None else f"{score:.4f}"}</td>']
        for c in columns:
            cells.append(f"<td>{_e(_cell(self.attributes[c].iloc[row]))}</td>")
        return f'<tr class="{css}">' + "".join(cells) + "</tr>"


_SECTIONS = (("summary", "Run"), ("metrics", "Held-out metrics"), ("curves", "Training curves"),
             ("spectrum", "Spectrum of the item embeddings"), ("map", "Item map"), ("neighbours", "Nearest neighbours"))

_CSS = """
body { font-family: -apple-system, "Segoe UI", Helvetica, Arial, sans-serif; max-width: 1100px; margin: 2em auto;
       padding: 0 1em; color: #222; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.1em; } h2 { margin-top: 1.8em; border-bottom: 1px solid #ddd; }
.muted { color: #777; font-size: 0.9em; margin-top: 0; } .how { color: #444; max-width: 60em; }
table { border-collapse: collapse; margin: 0.8em 0 1.2em; font-size: 0.92em; }
th, td { border: 1px solid #ddd; padding: 3px 8px; text-align: left; vertical-align: top; }
th { background: #f5f5f5; } caption { text-align: left; font-weight: bold; padding: 4px 0; }
td.num { text-align: right; font-variant-numeric: tabular-nums; } td.id { font-family: monospace; white-space: nowrap; }
tr.anchor td { background: #eef4fb; font-weight: bold; }
.summary th { width: 18em; } img { max-width: 100%; height: auto; display: block; margin: 0.5em 0; }
.notes { background: #fff6e0; border: 1px solid #f0d890; padding: 0.5em 1em; }
.toc { columns: 3; font-size: 0.95em; }
code { background: #f3f3f3; padding: 0 3px; }
"""


# ---- small helpers ---------------------------------------------------------------------------------
def _figure(width: float, height: float, panels: int):
    """A matplotlib Figure drawn by the Agg canvas (no pyplot, so no global backend is changed)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, panels, squeeze=False)[0]
    return fig, list(axes)


def _img(fig, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{data}">'


def _e(text: str) -> str:
    return html.escape(text, quote=True)


def _fmt(value) -> str:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "" if value is None else _e(str(value))
    return f"{value:.4f}" if isinstance(value, float) else f"{value:,}"


def _missing(value) -> bool:
    if value is None:
        return True
    if isinstance(value, (list, tuple, np.ndarray)):
        return False
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _cell(value) -> str:
    """One attribute value as short text: lists joined, floats to 4 significant digits."""
    if isinstance(value, (list, tuple, np.ndarray)):
        items = [str(plain(v)) for v in value]
        return ", ".join(items[:8]) + (f", ... ({len(items)})" if len(items) > 8 else "")
    if _missing(value):
        return ""
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if v.is_integer() and abs(v) < 1e15:
            return str(int(v))
        return f"{v:.2f}" if abs(v) >= 1 else f"{v:.4g}"  # prices keep their cents
    return str(plain(value))


def _is_vector_column(series: pd.Series) -> bool:
    """A column whose values are lists of numbers (an embedding-like vector): unreadable in a table."""
    first = series.dropna()
    if not len(first):
        return False
    v = first.iloc[0]
    if not isinstance(v, (list, tuple, np.ndarray)) or not len(v):
        return False
    return all(isinstance(x, (int, float, np.number)) and not isinstance(x, bool) for x in list(v)[:8])
