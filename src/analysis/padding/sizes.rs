//! Size advice: the padding every stage of a checkpoint gets at an image size, and the nearest
//! sizes (smaller and larger, the aspect ratio kept within [`ASPECT_TOLERANCE`]) at which no
//! stage pads at all: no input padding to the patch, no odd side before a patch merging, no
//! window padding in any block. Read off [`Geometry`], the layout the model itself runs.

use crate::engine::geometry::{Geometry, ModelShape, Semantics};

/// (height, width) in pixels.
type Size = (usize, usize);

/// Largest relative change of the aspect ratio (width / height) a suggested size may make.
pub const ASPECT_TOLERANCE: f64 = 0.05;

/// What one stage pads at a size.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct StagePadding {
    pub stage: usize,
    /// Token grid (rows, cols).
    pub grid: (usize, usize),
    /// Largest padded size any block of the stage uses (rows, cols).
    pub padded: (usize, usize),
    /// Windows of the stage's blocks (rows, cols), first block.
    pub window: (usize, usize),
    /// Whether the patch merging after this stage pads a row / a column (odd side).
    pub merge_pad: (bool, bool),
}

/// The padding at a size and the nearest sizes without any.
#[derive(Clone, Debug, PartialEq)]
pub struct SizeAdvice {
    /// Image (height, width).
    pub image: (usize, usize),
    /// Zero pixels added to reach a patch multiple (bottom, right).
    pub input_pad: (usize, usize),
    pub stages: Vec<StagePadding>,
    /// The largest size no larger in area that needs no padding, (height, width).
    pub down: Option<(usize, usize)>,
    /// The smallest size no smaller in area that needs no padding.
    pub up: Option<(usize, usize)>,
}

impl SizeAdvice {
    /// True when nothing pads at this size.
    pub fn needs_no_padding(&self) -> bool {
        self.input_pad == (0, 0)
            && self
                .stages
                .iter()
                .all(|s| s.padded == s.grid && s.merge_pad == (false, false))
    }

    /// The advice in words, one line per fact.
    pub fn text(&self) -> String {
        let (h, w) = self.image;
        let mut t = format!("image {w}x{h} (width x height)\n");
        t += &format!(
            "input padding to the patch: {} px bottom, {} px right\n",
            self.input_pad.0, self.input_pad.1
        );
        for s in &self.stages {
            t += &format!(
                "stage {}: grid {}x{} (rows x cols), window {}x{}, padded to {}x{} (+{} rows, +{} cols)",
                s.stage,
                s.grid.0,
                s.grid.1,
                s.window.0,
                s.window.1,
                s.padded.0,
                s.padded.1,
                s.padded.0 - s.grid.0,
                s.padded.1 - s.grid.1
            );
            match s.merge_pad {
                (false, false) => t += "\n",
                (r, c) => {
                    t += &format!(
                        "; the next patch merging pads {}\n",
                        match (r, c) {
                            (true, true) => "a row and a column",
                            (true, false) => "a row",
                            _ => "a column",
                        }
                    )
                }
            }
        }
        if self.needs_no_padding() {
            t += "no stage pads at this size\n";
        }
        let aspect = w as f64 / h as f64;
        let line = |name: &str, s: Option<(usize, usize)>| match s {
            Some((sh, sw)) => format!(
                "nearest size {name} without any padding: {sw}x{sh} (aspect {:+.2}%)\n",
                ((sw as f64 / sh as f64) / aspect - 1.0) * 100.0
            ),
            None => format!(
                "nearest size {name} without any padding: none within {:.0}% of the aspect\n",
                ASPECT_TOLERANCE * 100.0
            ),
        };
        t += &line("down", self.down);
        t += &line("up", self.up);
        t
    }
}

/// Whether a run at this layout pads anywhere.
fn pads(g: &Geometry) -> bool {
    let n = g.stages.len();
    g.input_pad() != (0, 0)
        || g.stages.iter().enumerate().any(|(i, s)| {
            s.padded() != s.grid || (i + 1 < n && (s.grid.0 % 2 == 1 || s.grid.1 % 2 == 1))
        })
}

/// The advice for an image of `image` = (height, width); sizes are searched up to `max_side`.
pub fn size_advice(
    image: (usize, usize),
    shape: &ModelShape,
    semantics: Semantics,
    max_side: usize,
) -> SizeAdvice {
    let g = Geometry::new(image, shape, semantics);
    let n = g.stages.len();
    let stages = g
        .stages
        .iter()
        .enumerate()
        .map(|(i, s)| StagePadding {
            stage: i,
            grid: s.grid,
            padded: s.padded(),
            window: s.blocks.first().map_or((0, 0), |b| b.window()),
            merge_pad: if i + 1 < n {
                (s.grid.0 % 2 == 1, s.grid.1 % 2 == 1)
            } else {
                (false, false)
            },
        })
        .collect();
    // A size without padding is a multiple of the patch times 2^(stages - 1) on both sides.
    let unit = shape.patch << n.saturating_sub(1);
    let aspect = image.1 as f64 / image.0 as f64;
    let area = (image.0 * image.1) as f64;
    let (mut down, mut up): (Option<Size>, Option<Size>) = (None, None);
    let key = |s: (usize, usize)| {
        let a = (s.0 * s.1) as f64;
        (
            (a - area).abs(),
            ((s.1 as f64 / s.0 as f64) / aspect - 1.0).abs(),
        )
    };
    for h in (unit..=max_side).step_by(unit) {
        let lo = (aspect * h as f64 * (1.0 - ASPECT_TOLERANCE) / unit as f64).ceil() as usize;
        let hi = (aspect * h as f64 * (1.0 + ASPECT_TOLERANCE) / unit as f64).floor() as usize;
        for m in lo.max(1)..=hi {
            let w = m * unit;
            if w > max_side || pads(&Geometry::new((h, w), shape, semantics)) {
                continue;
            }
            let a = (h * w) as f64;
            let better = |cur: Option<(usize, usize)>| {
                cur.is_none_or(|c| {
                    key((h, w)).partial_cmp(&key(c)) == Some(std::cmp::Ordering::Less)
                })
            };
            if a <= area && better(down) {
                down = Some((h, w));
            }
            if a >= area && better(up) {
                up = Some((h, w));
            }
        }
    }
    SizeAdvice {
        image,
        input_pad: g.input_pad(),
        stages,
        down,
        up,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{PadOrder, SmallStage};

    fn tiny() -> ModelShape {
        ModelShape {
            patch: 4,
            depths: vec![2, 2, 6, 2],
            window: (7, 7),
            built_for: None,
        }
    }

    fn sem() -> Semantics {
        Semantics {
            pad_order: PadOrder::PadThenShift,
            small_stage: SmallStage::Clamp,
        }
    }

    // 224 = 4 * 56 and 56, 28, 14, 7 are window multiples: the published size pads nothing.
    #[test]
    fn published_size_needs_nothing() {
        let a = size_advice((224, 224), &tiny(), sem(), 2048);
        assert!(a.needs_no_padding());
        assert_eq!((a.down, a.up), (Some((224, 224)), Some((224, 224))));
    }

    // Whatever the size, a suggestion needs no padding, keeps the aspect within the tolerance
    // and lies on its side of the area.
    #[test]
    fn suggestions_need_no_padding() {
        for sem in [
            sem(),
            Semantics {
                pad_order: PadOrder::ShiftThenPad,
                small_stage: SmallStage::ClampPerAxis,
            },
        ] {
            for image in [
                (250, 333),
                (160, 97),
                (427, 640),
                (375, 500),
                (800, 1216),
                (97, 97),
            ] {
                let a = size_advice(image, &tiny(), sem, 4096);
                let area = image.0 * image.1;
                let aspect = image.1 as f64 / image.0 as f64;
                for (s, down) in [(a.down, true), (a.up, false)] {
                    let Some(s) = s else { continue };
                    assert!(!pads(&Geometry::new(s, &tiny(), sem)), "{image:?} -> {s:?}");
                    let ratio = (s.1 as f64 / s.0 as f64) / aspect - 1.0;
                    assert!(ratio.abs() <= ASPECT_TOLERANCE, "{image:?} -> {s:?}");
                    assert!(if down {
                        s.0 * s.1 <= area
                    } else {
                        s.0 * s.1 >= area
                    });
                }
                assert!(a.up.is_some(), "{image:?}");
            }
        }
    }

    // 230x230: input pad 2; grids 58 (pad to 63), 29 (odd: merging pads; to 35), 15, 8.
    // With patch 4, four stages and window 7 clamped at the last stage, a side without padding
    // is 32 * k with 8k, 4k, 2k, k each a window multiple or clamped: 224 (k = 7) and 448
    // (k = 14) are the nearest square sizes.
    #[test]
    fn odd_size_gets_neighbours() {
        let a = size_advice((230, 230), &tiny(), sem(), 2048);
        assert_eq!(a.input_pad, (2, 2));
        assert_eq!(a.stages[0].grid, (58, 58));
        assert_eq!(a.stages[0].padded, (63, 63));
        assert_eq!(a.stages[1].merge_pad, (true, true));
        assert!(!a.needs_no_padding());
        assert_eq!(a.down, Some((224, 224)));
        assert_eq!(a.up, Some((448, 448)));
        assert!(a
            .text()
            .contains("nearest size up without any padding: 448x448"));
    }
}
