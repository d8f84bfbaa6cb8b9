"""Figure: which candidates on a slit are sources (before/after the review of candidates).

Usage::

    python benchmarks/extraction_objects_figure.py OUT.png

Builds the analytic frames of tests/test_extract.py (a bright star with slit-defect
sky residuals; a faint extended galaxy with a brighter field star and a faint star),
runs :func:`pipeline.extraction.frame.extract_objects` with the review switched off
(before) and on (after), prints what each found and plots the collapsed profiles with
the objects kept (target / other) and the candidates rejected.
"""

import sys
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from test_extract import _objects, _slit_defect_residual, _slit_frame  # noqa: E402

from pipeline.extraction.detect import spatial_profile  # noqa: E402

LOOSE = dict(residual_factor=0.0, min_fwhm_seeing=0.0, min_extracted_snr=0.0,
             max_sky_fraction=1e9)


def main(argv=None):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    argv = sys.argv[1:] if argv is None else argv
    out = Path(argv[0] if argv else "extraction_objects.png")
    cases = [("bright star + slit-defect residuals", 99.5,
              _slit_frame(np.random.default_rng(5), [(100.0, 1.3, 2e4)],
                          residual=_slit_defect_residual)),
             ("galaxy (target) + brighter field star + faint star", 62.0,
              _slit_frame(np.random.default_rng(8),
                          [(60.0, 4.0, 100.0), (140.0, 1.3, 400.0), (175.0, 1.3, 60.0)]))]
    fig, axes = plt.subplots(2, 2, figsize=(12, 7), sharex=True)
    for row, (title, expected, frame) in enumerate(cases):
        prof = spatial_profile(frame["data"], frame["variance"], frame["mask"])
        for col, (label, tracing) in enumerate((("before (no review)", LOOSE),
                                                ("after (review)", None))):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                objects = _objects(frame, expected_row_px=expected, tracing=tracing)
            ax = axes[row, col]
            ax.plot(prof, color="k", lw=0.8)
            ax.set_yscale("symlog", linthresh=5.0)
            ax.axvline(expected, color="tab:gray", ls=":", label="expected target row")
            names = []
            k = 0
            for tr, role in zip(objects.traces, objects.roles):
                k += role != "target"
                name = "target" if role == "target" else f"other{k}"
                names.append(f"{name}@{tr.centre_px:.1f}")
                ax.axvline(tr.centre_px, color="tab:green" if role == "target" else "tab:blue",
                           lw=1.2)
                ax.text(tr.centre_px + 1, ax.get_ylim()[1] * 0.5, name, fontsize=7,
                        rotation=90)
            for cand in objects.info.get("not_sources", []):
                ax.axvline(cand["row_px"], color="tab:red", ls="--", lw=1.0)
            ax.set_title(f"{title}\n{label}: {len(objects.traces)} object(s), "
                         f"{len(objects.info.get('not_sources', []))} rejected", fontsize=9)
            print(f"{title} | {label}: {', '.join(names)}; rejected: "
                  + "; ".join(f"{c['row_px']:.1f} ({c['reason'][:60]})"
                              for c in objects.info.get("not_sources", [])))
    for ax in axes[-1]:
        ax.set_xlabel("slit row (rectified)")
    for ax in axes[:, 0]:
        ax.set_ylabel("collapsed profile (e- / pixel)")
    fig.tight_layout()
    fig.savefig(out, dpi=90)
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
