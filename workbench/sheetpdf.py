"""The quality sheet's PDF pages, drawn with matplotlib from the sheet's own numbers."""

from __future__ import annotations

import io

from .quality import baselines
from .notices import CAUTION

# Ours in the app's amber, drawn thick; the standard codecs in muted tones of the app's dark
# panel colours, drawn thin, so our curve is the one the eye finds first.
COLOURS = {"ours": "#d98a00", "jpeg": "#7c828d", "jpeg2000": "#a0846a", "webp": "#5f7896", "avif": "#8a6a8f"}


def _width(name: str) -> float:
    return 2.2 if name == "ours" else 1.0
A4 = (8.27, 11.69)


def _page(fig, sheet, number):
    fig.text(0.06, 0.975, f"{sheet['title']} — {sheet['date']}", fontsize=8, color="#555555", va="top")
    fig.text(0.94, 0.975, f"page {number}", fontsize=8, color="#555555", va="top", ha="right")
    fig.text(0.06, 0.02, "Caution: " + CAUTION, fontsize=6.5, color="#7a4b00", wrap=True)


def _fmt(v, spec):
    if v is None:
        return "–"
    if isinstance(v, str):
        return v
    if v == float("inf"):
        return "inf"
    return format(v, spec)


def render(sheet: dict, rows, crops, tile: int) -> bytes:
    """The sheet's PDF: summary and folder curves, the per-image table, per-image curves and
    the worst tiles (``crops``: (tile PSNR, source image, decoded pixels, x, y), ``tile`` px)."""
    from matplotlib.backends.backend_pdf import PdfPages
    from matplotlib.figure import Figure

    buf = io.BytesIO()
    pages = 0
    with PdfPages(buf) as pdf:
        # 1. summary
        fig = Figure(figsize=A4)
        pages += 1
        _page(fig, sheet, pages)
        s = sheet["settings"]
        t = sheet["totals"]
        lines = [
            f"workbench {sheet['versions']['workbench']}   bundle {sheet['bundle']['file']}: "
            f"{sheet['bundle']['bytes']:,} bytes, sha256 {sheet['bundle']['sha256'][:32]}…",
            sheet["settings_text"],
            f"{t['images']} images, {t['pixels'] / 1e6:.2f} Mpixel; raw {t['raw_bytes'] / 1e6:.2f} MB -> bundle "
            f"{t['bundle_bytes'] / 1e6:.3f} MB (saving {100 * t['saving_vs_raw']:.1f} %)",
            "Libraries: " + ", ".join(f"{k} {v}" for k, v in sheet["versions"].items() if k != "workbench"),
        ]
        if t["passed"] is not None:
            fl = sheet["floors"]
            lines.append(f"Floors: PSNR >= {fl['psnr']}  SSIM >= {fl['ssim']}:  {t['passed']} of {t['images']} images pass")
        ts = sheet["target_search"]
        if ts and ts["unreachable"]:
            lines.append(f"Cannot reach {ts['kind']} >= {ts['floor']} at any step: " + ", ".join(ts["unreachable"]))
        if ts and ts["tuned_bytes"] is not None:
            lines.append(f"Target {ts['kind']} >= {ts['floor']}: per-image steps {ts['tuned_bytes']:,.0f} bytes; one step "
                         f"({ts['one_step']:.3g}) for all {ts['one_step_bytes']:,} bytes -> saving "
                         f"{100 * ts['saving_vs_one_step']:.1f} %" + (
                             f"; JPEG at the same floor {ts['jpeg_bytes']:,.0f} bytes -> saving {100 * ts['saving_vs_jpeg']:.1f} %"
                             if ts["jpeg_bytes"] else ""))
        for name, text in sheet.get("advice", {}).items():
            lines.append(f"{name}: {text}")
        if sheet["skipped"]:
            lines.append("Skipped (unreadable): " + ", ".join(x["name"] for x in sheet["skipped"]))
        fig.text(0.06, 0.94, "Quality sheet", fontsize=18, weight="bold", va="top")
        y = 0.905
        for line in lines:
            fig.text(0.06, y, line, fontsize=7.5, va="top", wrap=True)
            y -= 0.024
        folder = sheet["folder"]
        for j, key in enumerate(("psnr", "ssim")):
            ax = fig.add_axes([0.1, 0.44, 0.82, 0.27] if j == 0 else [0.1, 0.1, 0.82, 0.27])
            for name, pts in folder["curves"].items():
                ax.plot([p["bpp"] for p in pts], [p[key] for p in pts], "o-", ms=3, color=COLOURS.get(name, "k"),
                        lw=_width(name),
                        label="ours (" + s["method"] + ")" if name == "ours" else baselines.BASELINES[name].label)
            ax.set_xlabel("bits per pixel (whole file)")
            ax.set_ylabel("mean PSNR (dB)" if key == "psnr" else "mean SSIM")
            ax.grid(alpha=0.3)
            ax.legend(fontsize=7)
            bd = ", ".join(f"{n}: {_fmt(v[key], '+.1f')} %" for n, v in folder["bd_rate"].items())
            ax.set_title(f"Folder ({len(folder['images'])} of {len(rows)} images: those every codec carries), "
                         f"{key.upper()} vs rate.\nBD-rate of ours ({key.upper()}): {bd}", fontsize=8)
        pdf.savefig(fig)

        # 2. per-image table
        cols = ["name", "size", "bytes", "bpp", "ratio", "PSNR", "SSIM", "worst tile", "at", "pass"]
        per_page = 34
        for start in range(0, len(rows), per_page):
            fig = Figure(figsize=A4)
            pages += 1
            _page(fig, sheet, pages)
            fig.text(0.06, 0.94, "Per image (measured on the decoded bundle)", fontsize=13, weight="bold", va="top")
            ax = fig.add_axes([0.04, 0.06, 0.92, 0.84])
            ax.axis("off")
            cell = [[r.name[:28], f"{r.width}x{r.height}", f"{r.bytes:,.0f}", f"{r.bpp:.3f}", f"{r.ratio:.1f}",
                     _fmt(r.psnr, ".2f"), _fmt(r.ssim, ".4f"), _fmt(r.worst_tile_psnr, ".2f"),
                     f"{r.worst_tile_x},{r.worst_tile_y}", {None: "–", True: "pass", False: "FAIL"}[r.passed]]
                    for r in rows[start:start + per_page]]
            # the name column is wide enough for 28 characters at this size
            widths = [0.23, 0.09, 0.09, 0.07, 0.07, 0.07, 0.08, 0.09, 0.12, 0.06]
            tab = ax.table(cellText=cell, colLabels=cols, loc="upper center", cellLoc="right", colWidths=widths)
            tab.auto_set_font_size(False)
            tab.set_fontsize(6.5)
            tab.scale(1, 1.25)
            pdf.savefig(fig)

        # 3. per-image RD curves
        for fig, grid in _image_pages(sheet, rows, pages + 1, "Rate–distortion per image (PSNR; star = saved setting)",
                                      0.66):
            pages += 1
            for i, (ax, r) in enumerate(grid):
                for name, pts in r.curves.items():
                    ax.plot([p["bpp"] for p in pts], [min(p["psnr"], 99) for p in pts], "o-", ms=2.5,
                            color=COLOURS.get(name, "k"), lw=_width(name), label=name)
                ax.plot([r.bpp], [min(r.psnr, 99)], "*", ms=10, color=COLOURS["ours"])
                bd = " ".join(f"{n} {_fmt(v['psnr'], '+.0f')}%" for n, v in r.bd.items())
                _label_small(ax, f"{r.name[:30]}\nBD-rate: {bd}", legend=i == 0)
            pdf.savefig(fig)

        # 4. measurements against rate
        if sheet.get("safe_point"):
            pages = _measure_pages(pdf, sheet, rows, pages)

        # 5. worst tiles
        fig = Figure(figsize=A4)
        pages += 1
        _page(fig, sheet, pages)
        fig.text(0.06, 0.94, f"Worst {tile}-pixel tiles: original | reconstruction | difference x8", fontsize=13,
                 weight="bold", va="top")
        from matplotlib.patches import Rectangle

        from .display import difference, display_rgb

        for i, (tp, img, px, x, y) in enumerate(crops):
            pad = tile
            y0, x0 = max(0, y - pad), max(0, x - pad)
            y1, x1 = min(img.height, y + tile + pad), min(img.width, x + tile + pad)
            o, rc = img.pixels[y0:y1, x0:x1], px[y0:y1, x0:x1]
            for j, (arr, label) in enumerate(((display_rgb(o), "original"), (display_rgb(rc), "reconstruction"),
                                              (difference(o, rc, img.peak, 8.0), "difference"))):
                ax = fig.add_axes([0.06 + j * 0.3, 0.78 - i * 0.125, 0.27, 0.11])
                ax.imshow(arr, interpolation="nearest")
                ax.add_patch(Rectangle((x - x0 - 0.5, y - y0 - 0.5), tile, tile, fill=False, ec="white", lw=0.8))
                ax.set_xticks([])
                ax.set_yticks([])
                if j == 0:
                    ax.set_ylabel(f"{img.name[:16]}\n({x},{y}) {tp:.1f} dB", fontsize=6)
                if i == 0:
                    ax.set_title(label, fontsize=8)
        pdf.savefig(fig)
    return buf.getvalue()


PER_PAGE = 6  # images per page of small plots, in a 2 x 3 grid


def _image_pages(sheet, rows, first_page: int, title: str, top: float):
    """Pages of small per-image plots, numbered from ``first_page``: yields ``(figure,
    [(axes, row), ...])`` with six images a page; the caller draws and saves each figure."""
    from matplotlib.figure import Figure

    for n, start in enumerate(range(0, len(rows), PER_PAGE)):
        fig = Figure(figsize=A4)
        _page(fig, sheet, first_page + n)
        fig.text(0.06, 0.94, title, fontsize=13, weight="bold", va="top")
        yield fig, [(fig.add_axes([0.1 + (i % 2) * 0.45, top - (i // 2) * 0.29, 0.37, 0.22]), r)
                    for i, r in enumerate(rows[start:start + PER_PAGE])]


def _label_small(ax, title: str, legend: bool) -> None:
    ax.set_title(title, fontsize=6.5)
    ax.tick_params(labelsize=6)
    ax.set_xlabel("bpp", fontsize=6)
    ax.grid(alpha=0.3)
    if legend:
        ax.legend(fontsize=5.5)


def _measure_pages(pdf, sheet, rows, pages) -> int:
    from .quality.measures import Check

    safe = sheet["safe_point"]
    checks = [(d["measure"], Check(d["key"], d["limit"], d["kind"], d["ideal"])) for d in safe["limits"]]
    for fig, grid in _image_pages(sheet, rows, pages + 1, "Measurements against rate (dashed: the safe operating point)",
                                  0.64):
        pages += 1
        fig.text(0.06, 0.895, "Each tolerance's share used by the reconstruction: 0 = as in the original, "
                 "1 = at the limit (above the red line the check fails).", fontsize=7, va="top")
        fig.text(0.06, 0.915, "Tolerances: " + "; ".join(safe["checks"]), fontsize=7, va="top", wrap=True)
        for i, (ax, r) in enumerate(grid):
            pts = [p for p in r.curves.get("ours", []) if "measures" in p]
            for j, (name, check) in enumerate(checks):
                ax.plot([p["bpp"] for p in pts], [min(check.fraction(p["measures"][name]), 3.0) for p in pts], "o-",
                        ms=2.5, label=f"{name}: {check.text()}", color=MEASURE_COLOURS[j % len(MEASURE_COLOURS)])
            ax.axhline(1.0, color="#c0392b", lw=0.8)
            ax.set_ylim(-0.05, 3.05)
            point = safe["per_image"].get(r.name)
            if point is not None:
                ax.axvline(point["bpp"], ls="--", color="#444444", lw=0.8)
            verdict = "no safe point on the swept curve" if point is None else f"safe from {point['bpp']:.3f} bpp"
            ax.set_ylabel("share of tolerance (capped at 3)", fontsize=6)
            _label_small(ax, f"{r.name[:30]}\n{verdict}", legend=i == 0)
        pdf.savefig(fig)
    return pages


MEASURE_COLOURS = ("#d98a00", "#3f9e78", "#5f7896", "#8a6a8f", "#7c828d", "#a0846a")
