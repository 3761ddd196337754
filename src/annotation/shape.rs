//! The geometry of a region and its exact clipping to rectangles (token footprints, the image).
//!
//! Coordinates are image pixels as f64, with the origin at the top-left corner of the top-left
//! pixel, x to the right and y down; a box `[x0, x1) x [y0, y1)` covers whole pixels when its
//! corners are integers.

use serde::{Deserialize, Serialize};

/// The geometry of a region, in image pixel coordinates.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum Shape {
    /// An axis-aligned box `[x0, x1) x [y0, y1)`.
    Box { x0: f64, y0: f64, x1: f64, y1: f64 },
    /// A closed polygon, vertices in order (either orientation); the last vertex connects back
    /// to the first. Edges may touch but should not cross: a crossing polygon is measured by
    /// its winding number, so loops of opposite orientation cancel.
    Polygon { points: Vec<[f64; 2]> },
}

/// `[x0, y0, x1, y1]`, the rectangle convention of this module.
pub type Rect = [f64; 4];

impl Shape {
    /// Bounding rectangle `[x0, y0, x1, y1]` (`None` for a polygon without vertices).
    pub fn bounds(&self) -> Option<Rect> {
        match self {
            Shape::Box { x0, y0, x1, y1 } => {
                Some([x0.min(*x1), y0.min(*y1), x0.max(*x1), y0.max(*y1)])
            }
            Shape::Polygon { points } => {
                let first = points.first()?;
                Some(
                    points
                        .iter()
                        .fold([first[0], first[1], first[0], first[1]], |b, p| {
                            [
                                b[0].min(p[0]),
                                b[1].min(p[1]),
                                b[2].max(p[0]),
                                b[3].max(p[1]),
                            ]
                        }),
                )
            }
        }
    }

    /// Area in square pixels (the absolute shoelace area for polygons).
    pub fn area(&self) -> f64 {
        match self {
            Shape::Box { x0, y0, x1, y1 } => (x1 - x0).abs() * (y1 - y0).abs(),
            Shape::Polygon { points } => shoelace(points).abs(),
        }
    }

    /// Area of the part of the shape inside `rect`.
    ///
    /// Boxes: the product of the overlaps per axis. Polygons: the polygon is clipped against the
    /// rectangle's four half-planes one after the other (Sutherland–Hodgman) and the result
    /// measured with the shoelace formula. The clipped ring may contain zero-width bridges along
    /// the rectangle's sides, but each clip step changes the ring only by loops lying wholly
    /// outside the kept half-plane, so the winding number of every point inside the rectangle is
    /// unchanged and every point outside has winding number 0. The signed area, the integral of
    /// the winding number, is therefore exactly that of polygon ∩ rectangle, for convex, concave
    /// and self-touching polygons alike.
    pub fn intersection_area(&self, rect: Rect) -> f64 {
        match self {
            Shape::Box { .. } => {
                let b = self.bounds().expect("a box has bounds");
                let w = (b[2].min(rect[2]) - b[0].max(rect[0])).max(0.0);
                let h = (b[3].min(rect[3]) - b[1].max(rect[1])).max(0.0);
                w * h
            }
            Shape::Polygon { points } => shoelace(&clip_ring(points, rect)).abs(),
        }
    }

    /// The shape cut to `rect`: a box stays a box, a polygon is clipped as in
    /// [`Shape::intersection_area`]. `None` when nothing of positive area is left.
    pub fn clipped(&self, rect: Rect) -> Option<Shape> {
        match self {
            Shape::Box { .. } => {
                let b = self.bounds()?;
                let c = [
                    b[0].max(rect[0]),
                    b[1].max(rect[1]),
                    b[2].min(rect[2]),
                    b[3].min(rect[3]),
                ];
                (c[2] > c[0] && c[3] > c[1]).then_some(Shape::Box {
                    x0: c[0],
                    y0: c[1],
                    x1: c[2],
                    y1: c[3],
                })
            }
            Shape::Polygon { points } => {
                let ring = clip_ring(points, rect);
                (ring.len() >= 3 && shoelace(&ring).abs() > 0.0)
                    .then_some(Shape::Polygon { points: ring })
            }
        }
    }

    pub fn kind_name(&self) -> &'static str {
        match self {
            Shape::Box { .. } => "box",
            Shape::Polygon { .. } => "polygon",
        }
    }
}

/// Signed shoelace area of a closed ring (positive when counter-clockwise in a y-up frame).
/// Coordinates are taken relative to the first vertex so large offsets lose no precision.
pub fn shoelace(points: &[[f64; 2]]) -> f64 {
    if points.len() < 3 {
        return 0.0;
    }
    let o = points[0];
    let mut twice = 0.0;
    for i in 1..points.len() - 1 {
        let (a, b) = (points[i], points[i + 1]);
        twice += (a[0] - o[0]) * (b[1] - o[1]) - (b[0] - o[0]) * (a[1] - o[1]);
    }
    twice / 2.0
}

/// Sutherland–Hodgman clipping of a closed ring against the rectangle `[x0, y0, x1, y1]`.
/// Vertices on a side count as inside; crossing points are computed from the edge's two ends.
pub fn clip_ring(points: &[[f64; 2]], rect: Rect) -> Vec<[f64; 2]> {
    // (axis, bound, keep values >= bound?)
    let planes = [
        (0usize, rect[0], true),
        (0, rect[2], false),
        (1, rect[1], true),
        (1, rect[3], false),
    ];
    let mut ring: Vec<[f64; 2]> = points.to_vec();
    for (axis, bound, keep_above) in planes {
        if ring.is_empty() {
            break;
        }
        let inside = |p: &[f64; 2]| {
            if keep_above {
                p[axis] >= bound
            } else {
                p[axis] <= bound
            }
        };
        let cross = |a: &[f64; 2], b: &[f64; 2]| {
            let t = (bound - a[axis]) / (b[axis] - a[axis]);
            let mut p = [a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1])];
            p[axis] = bound; // exactly on the side, whatever the rounding of t
            p
        };
        let mut out = Vec::with_capacity(ring.len() + 4);
        for i in 0..ring.len() {
            let cur = ring[i];
            let prev = ring[(i + ring.len() - 1) % ring.len()];
            match (inside(&prev), inside(&cur)) {
                (true, true) => out.push(cur),
                (true, false) => out.push(cross(&prev, &cur)),
                (false, true) => {
                    out.push(cross(&prev, &cur));
                    out.push(cur);
                }
                (false, false) => {}
            }
        }
        ring = out;
    }
    ring
}

/// Whether two closed-ring edges cross properly (touching at a point or overlapping along a
/// line does not count).
fn edges_cross(a: [f64; 2], b: [f64; 2], c: [f64; 2], d: [f64; 2]) -> bool {
    let orient = |p: [f64; 2], q: [f64; 2], r: [f64; 2]| {
        ((q[0] - p[0]) * (r[1] - p[1]) - (q[1] - p[1]) * (r[0] - p[0])).signum()
    };
    let (o1, o2) = (orient(a, b, c), orient(a, b, d));
    let (o3, o4) = (orient(c, d, a), orient(c, d, b));
    o1 * o2 < 0.0 && o3 * o4 < 0.0
}

/// Whether any two non-adjacent edges of the ring cross.
pub fn ring_crosses_itself(points: &[[f64; 2]]) -> bool {
    let n = points.len();
    if n < 4 {
        return false;
    }
    for i in 0..n {
        let (a, b) = (points[i], points[(i + 1) % n]);
        for j in i + 2..n {
            if i == 0 && j == n - 1 {
                continue; // adjacent through the closing edge
            }
            if edges_cross(a, b, points[j], points[(j + 1) % n]) {
                return true;
            }
        }
    }
    false
}

#[cfg(test)]
mod tests {
    use super::*;
    fn square(x0: f64, y0: f64, s: f64) -> Vec<[f64; 2]> {
        vec![[x0, y0], [x0 + s, y0], [x0 + s, y0 + s], [x0, y0 + s]]
    }

    #[test]
    fn labels_box_and_polygon_areas_agree() {
        let b = Shape::Box {
            x0: 1.0,
            y0: 2.0,
            x1: 5.0,
            y1: 4.0,
        };
        let p = Shape::Polygon {
            points: vec![[1.0, 2.0], [5.0, 2.0], [5.0, 4.0], [1.0, 4.0]],
        };
        for rect in [
            [0.0, 0.0, 3.0, 3.0],
            [2.0, 2.5, 10.0, 3.0],
            [6.0, 0.0, 7.0, 9.0],
        ] {
            assert!((b.intersection_area(rect) - p.intersection_area(rect)).abs() < 1e-12);
        }
        assert_eq!(b.area(), 8.0);
        assert_eq!(p.area(), 8.0);
    }

    #[test]
    fn labels_clip_keeps_orientation_independent_area() {
        let mut cw = square(0.0, 0.0, 4.0);
        cw.reverse();
        let s = Shape::Polygon { points: cw };
        assert_eq!(s.intersection_area([1.0, 1.0, 2.0, 9.0]), 3.0);
    }

    #[test]
    fn labels_crossing_detected() {
        let bowtie = vec![[0.0, 0.0], [2.0, 2.0], [2.0, 0.0], [0.0, 2.0]];
        assert!(ring_crosses_itself(&bowtie));
        assert!(!ring_crosses_itself(&square(0.0, 0.0, 1.0)));
        // Two triangles meeting at one vertex touch but do not cross.
        let touch = vec![
            [0.0, 0.0],
            [2.0, 0.0],
            [1.0, 1.0],
            [2.0, 2.0],
            [0.0, 2.0],
            [1.0, 1.0],
        ];
        assert!(!ring_crosses_itself(&touch));
    }
}
