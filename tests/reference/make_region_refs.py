"""Reference values for the region statistics tests (tests/regions.rs).

Writes tests/fixtures/regions/auroc.json (AUROC of fixed score vectors, many with ties, from
scikit-learn's roc_auc_score) and tests/fixtures/regions/coverage.json (areas of polygon and box
regions intersected with rectangles, from shapely). Library versions are recorded in both files.

    python -m venv <somewhere outside the repository>
    <that venv>/bin/pip install scikit-learn shapely numpy
    <that venv>/bin/python tests/reference/make_region_refs.py
"""

import json
import platform
import sys
from pathlib import Path

import numpy as np
import shapely
import sklearn
from shapely.geometry import Polygon, box
from shapely.validation import make_valid
from sklearn.metrics import roc_auc_score

OUT = Path(__file__).resolve().parent.parent / "fixtures" / "regions"


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit-learn": sklearn.__version__,
        "shapely": shapely.__version__,
        "geos": ".".join(str(v) for v in shapely.geos_version),
    }


def auroc_cases():
    rng = np.random.default_rng(20240611)
    cases = [
        ("hand", [3.0, 5.0, 1.0, 2.0, 3.0], [1, 1, 0, 0, 0]),
        ("all_tied", [2.0] * 7, [1, 0, 1, 0, 0, 1, 0]),
        ("perfect", [5.0, 6.0, 7.0, 1.0, 2.0], [1, 1, 1, 0, 0]),
        ("reversed", [5.0, 6.0, 7.0, 1.0, 2.0], [0, 0, 0, 1, 1]),
        ("one_positive", [0.3, 0.1, 0.7, 0.3, 0.9], [0, 0, 0, 1, 0]),
        ("negative_values", [-1.5, -0.5, -0.5, 0.0, 2.5, -3.0], [1, 0, 1, 0, 1, 0]),
    ]
    # Larger vectors with heavy ties: scores rounded to one decimal, shifted for the positives.
    for n, shift in [(50, 0.3), (400, 0.1), (1000, 0.0)]:
        y = (rng.random(n) < 0.3).astype(int)
        s = np.round(rng.normal(size=n) + shift * y, 1)
        cases.append((f"ties_{n}", s.tolist(), y.tolist()))
    # Continuous scores, no ties.
    y = (rng.random(300) < 0.5).astype(int)
    s = rng.normal(size=300) + 0.7 * y
    cases.append(("continuous_300", s.tolist(), y.tolist()))
    out = []
    for name, scores, labels in cases:
        out.append(
            {
                "name": name,
                "scores": [float(v) for v in scores],
                "labels": [int(v) for v in labels],
                "expected": float(roc_auc_score(labels, scores)),
            }
        )
    return out


def polygons():
    """(name, ring, note). Rings are open (the last vertex joins the first)."""
    return [
        ("triangle", [(1.0, 1.0), (9.5, 2.0), (4.0, 8.5)], "convex"),
        ("pentagon_cw", [(5, 0), (9.8, 3.5), (8, 9), (2, 9), (0.2, 3.5)][::-1], "convex, clockwise"),
        ("l_shape", [(0, 0), (8, 0), (8, 3), (3, 3), (3, 8), (0, 8)], "concave"),
        (
            "comb",
            [(0, 0), (10, 0), (10, 6), (8, 6), (8, 2), (6, 2), (6, 6), (4, 6), (4, 2), (2, 2), (2, 6), (0, 6)],
            "concave, teeth leave and re-enter a rectangle several times",
        ),
        (
            "star",
            [
                (5 + r * np.cos(a), 5 + r * np.sin(a))
                for k in range(10)
                for a, r in [(np.pi / 2 + k * np.pi / 5, 4.7 if k % 2 == 0 else 1.9)]
            ],
            "concave, non-integer vertices",
        ),
        (
            "touching_vertex",
            [(0, 0), (4, 0), (2, 2), (4, 4), (0, 4), (2, 2)],
            "self-touching: two triangles meeting at one vertex, one ring",
        ),
        (
            "vertex_on_edge",
            [(0, 0), (4, 0), (4, 4), (3, 4), (2, 0), (1, 4), (0, 4)],
            "self-touching: a vertex lies on another edge",
        ),
        (
            "spike",
            [(0, 0), (6, 0), (6, 6), (0, 6), (0, 3), (4, 3), (0, 3)],
            "self-touching: a zero-width spike into the interior",
        ),
        (
            "off_image",
            [(-3.0, -2.0), (7.5, -1.0), (12.0, 6.0), (3.0, 11.5), (-1.0, 5.0)],
            "partly outside a 10x10 image",
        ),
    ]


RECTS = [
    [0.0, 0.0, 10.0, 10.0],  # the 10x10 image
    [2.0, 2.0, 6.0, 5.0],
    [1.0, 0.0, 3.0, 8.0],
    [3.5, 3.5, 4.5, 4.5],
    [-5.0, -5.0, 2.0, 1.0],
    [2.0, 4.0, 10.0, 10.0],
    [20.0, 20.0, 24.0, 24.0],  # disjoint
    [0.25, 1.75, 9.0, 2.75],
]

BOXES = [
    ("box_inside", [2.0, 3.0, 7.0, 6.5]),
    ("box_off_image", [-2.5, 6.0, 13.0, 12.0]),
    ("box_fractional", [0.3, 0.7, 4.2, 9.9]),
]


def area_with(geom, rect):
    r = box(*rect)
    if not geom.is_valid:
        # GEOS needs a valid geometry for overlay; make_valid keeps the covered area.
        geom = make_valid(geom)
    return float(geom.intersection(r).area)


def coverage_cases():
    out = []
    for name, ring, note in polygons():
        g = Polygon(ring)
        out.append(
            {
                "name": name,
                "note": note,
                "kind": "polygon",
                "points": [[float(x), float(y)] for x, y in ring],
                "valid_in_shapely": bool(g.is_valid),
                "area": float((make_valid(g) if not g.is_valid else g).area),
                "rects": RECTS,
                "expected": [area_with(g, r) for r in RECTS],
            }
        )
    for name, b in BOXES:
        g = box(*b)
        out.append(
            {
                "name": name,
                "note": "box [x0, y0, x1, y1]",
                "kind": "box",
                "box": b,
                "valid_in_shapely": True,
                "area": float(g.area),
                "rects": RECTS,
                "expected": [area_with(g, r) for r in RECTS],
            }
        )
    return out


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    v = versions()
    auroc = {
        "source": "sklearn.metrics.roc_auc_score(labels, scores)",
        "versions": v,
        "cases": auroc_cases(),
    }
    cov = {
        "source": "shapely: Polygon(points) or box(*b), make_valid when invalid, "
        ".intersection(box(*rect)).area",
        "versions": v,
        "cases": coverage_cases(),
    }
    (OUT / "auroc.json").write_text(json.dumps(auroc, indent=1) + "\n")
    (OUT / "coverage.json").write_text(json.dumps(cov, indent=1) + "\n")
    print(f"wrote {OUT / 'auroc.json'} and {OUT / 'coverage.json'} with {v}", file=sys.stderr)


if __name__ == "__main__":
    main()
