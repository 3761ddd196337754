//! Stage grids, padding and window partitions of a shifted-window backbone.
//!
//! This module is the one source of truth for *where* every token goes: the model pads, rolls and
//! partitions with the gather/scatter indices computed here, builds its shift masks from the
//! region labels computed here, and the overlays draw the very same windows. Nothing else in the
//! project recomputes a window position.
//!
//! Everything is separable per axis: a block's partition is the product of one [`AxisPlan`] for
//! rows and one for columns. Coordinates come in two kinds:
//! - *grid positions* `p` in `0..padded`: the stage's own token grid, with `p >= len` the zero
//!   padding appended at the bottom/right;
//! - *slots* `i` in `0..padded`: positions on the rolled, padded map that is cut into windows
//!   (`window = i / w`, position inside the window `i % w`).

use serde::{Deserialize, Serialize};

/// When the cyclic shift happens relative to padding the map up to a window multiple.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Hash)]
#[serde(rename_all = "kebab-case")]
pub enum PadOrder {
    /// Zero-pad to a window multiple, roll the padded map, mask on it, roll back, crop
    /// (transformers; the original detection code).
    PadThenShift,
    /// Roll the unpadded map, zero-pad, mask on the padded size, crop, roll back (timm >= 0.9).
    ShiftThenPad,
}

/// What a stage does when one of its sides is not larger than the window.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Hash)]
#[serde(rename_all = "kebab-case")]
pub enum SmallStage {
    /// When the smaller side is <= the window: square window of the smaller side, no shift.
    Clamp,
    /// Always partition with the full window, padding the stage up, and keep the shift.
    PadUp,
    /// Per axis: a side <= the window gets window = side and no shift on that axis (timm).
    ClampPerAxis,
    /// Windows fixed when the model was built, from the image size it was built for
    /// ([`ModelShape::built_for`]; transformers' Swinv2): a stage whose grid at that size is not
    /// larger than the window along the rows gets that grid side as a square window and no
    /// shift, whatever the input; every stage is then padded up to its window.
    AsBuilt,
}

impl PadOrder {
    pub fn name(self) -> &'static str {
        match self {
            PadOrder::PadThenShift => "pad-then-shift",
            PadOrder::ShiftThenPad => "shift-then-pad",
        }
    }
}

impl SmallStage {
    pub fn name(self) -> &'static str {
        match self {
            SmallStage::Clamp => "clamp",
            SmallStage::PadUp => "pad-up",
            SmallStage::ClampPerAxis => "clamp-per-axis",
            SmallStage::AsBuilt => "as-built",
        }
    }
}

/// The padding semantics one forward pass runs under.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Hash)]
pub struct Semantics {
    pub pad_order: PadOrder,
    pub small_stage: SmallStage,
}

/// One axis of one block: how `len` tokens are padded, rolled and cut into windows of `window`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
pub struct AxisPlan {
    /// Tokens on this axis before padding.
    pub len: usize,
    /// Window extent on this axis.
    pub window: usize,
    /// Cyclic shift on this axis (0 for regular windows).
    pub shift: usize,
    /// `len` rounded up to a multiple of `window`.
    pub padded: usize,
    pub order: PadOrder,
}

impl AxisPlan {
    pub fn new(len: usize, window: usize, shift: usize, order: PadOrder) -> Self {
        assert!(len > 0 && window > 0, "empty axis");
        let padded = len.div_ceil(window) * window;
        AxisPlan {
            len,
            window,
            shift,
            padded,
            order,
        }
    }

    /// Zero tokens appended to this axis.
    pub fn pad(&self) -> usize {
        self.padded - self.len
    }

    pub fn n_windows(&self) -> usize {
        self.padded / self.window
    }

    /// The grid position whose token lands in slot `i`; `None` for a zero padding token.
    pub fn source_of_slot(&self, i: usize) -> Option<usize> {
        debug_assert!(i < self.padded);
        match self.order {
            PadOrder::PadThenShift => {
                let p = (i + self.shift) % self.padded;
                (p < self.len).then_some(p)
            }
            PadOrder::ShiftThenPad => {
                (i < self.len).then(|| (i + self.shift % self.len) % self.len)
            }
        }
    }

    /// The slot that grid position `p` (padding included, `p < padded`) lands in.
    pub fn slot_of(&self, p: usize) -> usize {
        debug_assert!(p < self.padded);
        match self.order {
            PadOrder::PadThenShift => (p + self.padded - self.shift % self.padded) % self.padded,
            PadOrder::ShiftThenPad if p < self.len => {
                (p + self.len - self.shift % self.len) % self.len
            }
            PadOrder::ShiftThenPad => p,
        }
    }

    /// Mask region (0, 1 or 2) of slot `i`: the three bands `[0, P-w)`, `[P-w, P-s)`, `[P-s, P)`
    /// of the published shifted-window mask, laid on the padded map. One band when unshifted.
    pub fn region_of_slot(&self, i: usize) -> u8 {
        if self.shift == 0 {
            return 0;
        }
        // Python slices: [0:-w], [-w:-s], [-s:]; a negative start beyond the map clamps to 0.
        let first_end = self.padded.saturating_sub(self.window);
        let second_end = self.padded.saturating_sub(self.shift);
        if i >= second_end {
            2
        } else if i >= first_end {
            1
        } else {
            0
        }
    }

    /// Runs of consecutive grid positions (padding included) that share a window and a mask
    /// region: `(start, end, window, region)`. These are the pieces the overlays draw.
    pub fn runs(&self) -> Vec<(usize, usize, usize, u8)> {
        let mut out: Vec<(usize, usize, usize, u8)> = Vec::new();
        for p in 0..self.padded {
            let s = self.slot_of(p);
            let label = (s / self.window, self.region_of_slot(s));
            match out.last_mut() {
                Some(last) if (last.2, last.3) == label && last.1 == p => last.1 = p + 1,
                _ => out.push((p, p + 1, label.0, label.1)),
            }
        }
        out
    }
}

/// One block's partition: rows and columns.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
pub struct BlockGeometry {
    pub rows: AxisPlan,
    pub cols: AxisPlan,
}

/// A rectangle of grid tokens `[row0, row1) x [col0, col1)` that attends as one group: one window
/// and one mask region. Rows/cols at or past the stage size are padding.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
pub struct WindowPiece {
    pub row0: usize,
    pub row1: usize,
    pub col0: usize,
    pub col1: usize,
    /// Window index, row-major over the window grid.
    pub window: usize,
    /// Mask region id (row band * 3 + column band), as the published mask numbers them.
    pub region: u8,
}

impl BlockGeometry {
    pub fn window(&self) -> (usize, usize) {
        (self.rows.window, self.cols.window)
    }
    pub fn shift(&self) -> (usize, usize) {
        (self.rows.shift, self.cols.shift)
    }
    pub fn padded(&self) -> (usize, usize) {
        (self.rows.padded, self.cols.padded)
    }
    pub fn is_shifted(&self) -> bool {
        self.rows.shift > 0 || self.cols.shift > 0
    }
    pub fn n_windows(&self) -> usize {
        self.rows.n_windows() * self.cols.n_windows()
    }
    /// Tokens per window.
    pub fn window_area(&self) -> usize {
        self.rows.window * self.cols.window
    }

    /// For every window (row-major) and every position inside it (row-major), the flat index
    /// `row * W + col` of the grid token it holds, or `H * W` for a zero padding token.
    /// The model gathers window batches with it from `[H*W + 1, C]` (last row zeros).
    pub fn gather_index(&self) -> Vec<u32> {
        let (h, w) = (self.rows.len, self.cols.len);
        let (wh, ww) = self.window();
        let pad = (h * w) as u32;
        let mut out = Vec::with_capacity(self.n_windows() * self.window_area());
        for a in 0..self.rows.n_windows() {
            for b in 0..self.cols.n_windows() {
                for r in 0..wh {
                    let src_r = self.rows.source_of_slot(a * wh + r);
                    for c in 0..ww {
                        let src_c = self.cols.source_of_slot(b * ww + c);
                        out.push(match (src_r, src_c) {
                            (Some(y), Some(x)) => (y * w + x) as u32,
                            _ => pad,
                        });
                    }
                }
            }
        }
        out
    }

    /// For every grid token (row-major, unpadded), its flat index in the window batch
    /// `window * window_area + position`: the inverse of [`Self::gather_index`] on real tokens.
    pub fn scatter_index(&self) -> Vec<u32> {
        let (h, w) = (self.rows.len, self.cols.len);
        let mut out = Vec::with_capacity(h * w);
        for y in 0..h {
            for x in 0..w {
                out.push(self.batch_index(y, x) as u32);
            }
        }
        out
    }

    /// Window index and position inside the window of grid token `(row, col)` (padding allowed).
    pub fn window_of(&self, row: usize, col: usize) -> (usize, usize) {
        let (wh, ww) = self.window();
        let (sr, sc) = (self.rows.slot_of(row), self.cols.slot_of(col));
        let window = (sr / wh) * self.cols.n_windows() + sc / ww;
        (window, (sr % wh) * ww + sc % ww)
    }

    fn batch_index(&self, row: usize, col: usize) -> usize {
        let (window, pos) = self.window_of(row, col);
        window * self.window_area() + pos
    }

    /// Mask region id of every position of every window, `[n_windows * window_area]`.
    pub fn region_ids(&self) -> Vec<u8> {
        let (wh, ww) = self.window();
        let mut out = Vec::with_capacity(self.n_windows() * self.window_area());
        for a in 0..self.rows.n_windows() {
            for b in 0..self.cols.n_windows() {
                for r in 0..wh {
                    let rr = self.rows.region_of_slot(a * wh + r);
                    for c in 0..ww {
                        out.push(rr * 3 + self.cols.region_of_slot(b * ww + c));
                    }
                }
            }
        }
        out
    }

    /// The additive shift mask `[n_windows, N, N]`: 0 within a region, -100 across regions
    /// (the published value). `None` for unshifted blocks, which use no mask.
    pub fn shift_mask(&self) -> Option<Vec<f32>> {
        self.shift_mask_with(-100.0)
    }

    /// [`Self::shift_mask`] with `fill` across regions (transformers' Swinv2 adds its -100 mask
    /// twice, so its blocks see -200).
    pub fn shift_mask_with(&self, fill: f32) -> Option<Vec<f32>> {
        if !self.is_shifted() {
            return None;
        }
        let n = self.window_area();
        let ids = self.region_ids();
        let mut out = Vec::with_capacity(ids.len() * n);
        for win in ids.chunks(n) {
            for &a in win {
                out.extend(win.iter().map(|&b| if a == b { 0.0 } else { fill }));
            }
        }
        Some(out)
    }

    /// The attention groups as rectangles in grid coordinates (padding included).
    pub fn pieces(&self) -> Vec<WindowPiece> {
        let rows = self.rows.runs();
        let cols = self.cols.runs();
        let mut out = Vec::with_capacity(rows.len() * cols.len());
        for &(r0, r1, wr, rr) in &rows {
            for &(c0, c1, wc, rc) in &cols {
                out.push(WindowPiece {
                    row0: r0,
                    row1: r1,
                    col0: c0,
                    col1: c1,
                    window: wr * self.cols.n_windows() + wc,
                    region: rr * 3 + rc,
                });
            }
        }
        out
    }
}

/// One stage: its token grid and the partition of each of its blocks.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct StageGeometry {
    pub index: usize,
    /// Token grid (rows, cols) of this stage, before window padding.
    pub grid: (usize, usize),
    /// Input pixels per token along each axis (patch size times 2^stage).
    pub stride: usize,
    pub blocks: Vec<BlockGeometry>,
}

impl StageGeometry {
    /// The largest padded size any block of this stage uses.
    pub fn padded(&self) -> (usize, usize) {
        self.blocks.iter().fold(self.grid, |acc, b| {
            let p = b.padded();
            (acc.0.max(p.0), acc.1.max(p.1))
        })
    }

    /// The input-pixel rectangle `[y0, y1) x [x0, x1)` of token `(row, col)`, clipped to `image`
    /// (height, width). Empty (y0 == y1 or x0 == x1) for a token that lies wholly in padding.
    pub fn footprint(&self, row: usize, col: usize, image: (usize, usize)) -> [usize; 4] {
        let s = self.stride;
        let clip = |v: usize, max: usize| v.min(max);
        [
            clip(row * s, image.0),
            clip((row + 1) * s, image.0),
            clip(col * s, image.1),
            clip((col + 1) * s, image.1),
        ]
    }
}

/// Patch merging of a `grid` = (rows, cols) map: for every output token (row-major over
/// `ceil(rows/2) x ceil(cols/2)`) the four source tokens `x[2i,2j], x[2i+1,2j], x[2i,2j+1],
/// x[2i+1,2j+1]` (the published concatenation order) as flat indices, `rows * cols` for the zero
/// padding an odd side gets at the bottom/right.
pub fn merge_index(grid: (usize, usize)) -> (Vec<u32>, (usize, usize)) {
    let (h, w) = grid;
    let out = (h.div_ceil(2), w.div_ceil(2));
    let pad = (h * w) as u32;
    let mut idx = Vec::with_capacity(out.0 * out.1 * 4);
    for i in 0..out.0 {
        for j in 0..out.1 {
            for (dy, dx) in [(0, 0), (1, 0), (0, 1), (1, 1)] {
                let (y, x) = (2 * i + dy, 2 * j + dx);
                idx.push(if y < h && x < w {
                    (y * w + x) as u32
                } else {
                    pad
                });
            }
        }
    }
    (idx, out)
}

/// What the geometry needs to know of a model.
#[derive(Clone, Debug, PartialEq)]
pub struct ModelShape {
    pub patch: usize,
    pub depths: Vec<usize>,
    /// Nominal window (rows, cols).
    pub window: (usize, usize),
    /// The image size (height, width) the model was built for, where its windows were fixed
    /// then ([`SmallStage::AsBuilt`]); `None`: as if built for the input it runs on.
    pub built_for: Option<(usize, usize)>,
}

/// The whole partition of one forward pass at one input size.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Geometry {
    /// Image size (height, width) in pixels, as given.
    pub image: (usize, usize),
    /// Input after zero padding to a multiple of the patch (height, width).
    pub input_padded: (usize, usize),
    pub patch: usize,
    pub semantics: Semantics,
    pub stages: Vec<StageGeometry>,
}

/// Window and shift of stage `index` under a small-stage policy (before the even/odd rule);
/// `built_grid` is the patch grid of the size the model was built for ([`SmallStage::AsBuilt`]).
fn stage_window(
    grid: (usize, usize),
    nominal: (usize, usize),
    policy: SmallStage,
    index: usize,
    built_grid: (usize, usize),
) -> ((usize, usize), (usize, usize)) {
    let full_shift = (nominal.0 / 2, nominal.1 / 2);
    match policy {
        SmallStage::PadUp => (nominal, full_shift),
        SmallStage::AsBuilt => {
            // transformers: the construction grid halves with floor division, and the row
            // side alone decides the (square) window.
            let side = (built_grid.0 >> index).max(1);
            if side <= nominal.0 {
                ((side, side), (0, 0))
            } else {
                ((nominal.0, nominal.0), (full_shift.0, full_shift.0))
            }
        }
        SmallStage::Clamp => {
            let m = grid.0.min(grid.1);
            if m <= nominal.0.min(nominal.1) {
                ((m, m), (0, 0))
            } else {
                (nominal, full_shift)
            }
        }
        SmallStage::ClampPerAxis => {
            let axis = |len: usize, w: usize, s: usize| if len <= w { (len, 0) } else { (w, s) };
            let (wr, sr) = axis(grid.0, nominal.0, full_shift.0);
            let (wc, sc) = axis(grid.1, nominal.1, full_shift.1);
            ((wr, wc), (sr, sc))
        }
    }
}

impl Geometry {
    /// Lay out a forward pass of `shape` over an image of `image` = (height, width) pixels.
    pub fn new(image: (usize, usize), shape: &ModelShape, semantics: Semantics) -> Self {
        assert!(image.0 > 0 && image.1 > 0 && shape.patch > 0);
        let p = shape.patch;
        let mut grid = (image.0.div_ceil(p), image.1.div_ceil(p));
        let input_padded = (grid.0 * p, grid.1 * p);
        let built = shape.built_for.unwrap_or(image);
        let built_grid = (built.0 / p, built.1 / p);
        let mut stages = Vec::with_capacity(shape.depths.len());
        for (index, &depth) in shape.depths.iter().enumerate() {
            if index > 0 {
                grid = (grid.0.div_ceil(2), grid.1.div_ceil(2));
            }
            let (window, shift) =
                stage_window(grid, shape.window, semantics.small_stage, index, built_grid);
            let blocks = (0..depth)
                .map(|j| {
                    let s = if j % 2 == 1 { shift } else { (0, 0) };
                    BlockGeometry {
                        rows: AxisPlan::new(grid.0, window.0, s.0, semantics.pad_order),
                        cols: AxisPlan::new(grid.1, window.1, s.1, semantics.pad_order),
                    }
                })
                .collect();
            stages.push(StageGeometry {
                index,
                grid,
                stride: p << index,
                blocks,
            });
        }
        Geometry {
            image,
            input_padded,
            patch: p,
            semantics,
            stages,
        }
    }

    /// Token grid of the patch embedding.
    pub fn embed_grid(&self) -> (usize, usize) {
        (
            self.input_padded.0 / self.patch,
            self.input_padded.1 / self.patch,
        )
    }

    /// Pixels of zero padding added to the input (bottom, right).
    pub fn input_pad(&self) -> (usize, usize) {
        (
            self.input_padded.0 - self.image.0,
            self.input_padded.1 - self.image.1,
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sem(pad_order: PadOrder, small_stage: SmallStage) -> Semantics {
        Semantics {
            pad_order,
            small_stage,
        }
    }

    fn tiny_shape(window: usize) -> ModelShape {
        ModelShape {
            patch: 4,
            depths: vec![2, 2, 6, 2],
            window: (window, window),
            built_for: None,
        }
    }

    // Liu et al. 2021, Sec. 3.1/3.2: a 224x224 input with patch 4 gives 56x56, 28x28, 14x14, 7x7
    // tokens; windows of 7 give (56/7)^2 = 64, 16, 4 and 1 windows.
    #[test]
    fn published_224_window_counts() {
        let g = Geometry::new(
            (224, 224),
            &tiny_shape(7),
            sem(PadOrder::PadThenShift, SmallStage::Clamp),
        );
        let grids: Vec<_> = g.stages.iter().map(|s| s.grid).collect();
        assert_eq!(grids, vec![(56, 56), (28, 28), (14, 14), (7, 7)]);
        let counts: Vec<_> = g.stages.iter().map(|s| s.blocks[0].n_windows()).collect();
        assert_eq!(counts, vec![64, 16, 4, 1]);
        // Shift floor(M/2) = 3 in odd blocks, none in even blocks; the 7x7 stage is clamped.
        assert_eq!(g.stages[0].blocks[1].shift(), (3, 3));
        assert_eq!(g.stages[0].blocks[0].shift(), (0, 0));
        assert_eq!(g.stages[3].blocks[1].shift(), (0, 0));
        assert_eq!(g.input_pad(), (0, 0));
    }

    // Published mask: on a padded map of P with window w and shift s the three bands per axis are
    // [0, P-w), [P-w, P-s), [P-s, P); only the last window row/column is split.
    #[test]
    fn mask_regions_follow_published_bands() {
        let a = AxisPlan::new(14, 7, 3, PadOrder::PadThenShift);
        let regions: Vec<u8> = (0..14).map(|i| a.region_of_slot(i)).collect();
        assert_eq!(regions, [vec![0u8; 7], vec![1u8; 4], vec![2u8; 3]].concat());
        let b = BlockGeometry { rows: a, cols: a };
        let mask = b.shift_mask().unwrap();
        let n = 49;
        assert_eq!(mask.len(), 4 * n * n);
        // Window 0 (top-left) has one region: no -100 anywhere.
        assert!(mask[..n * n].iter().all(|&v| v == 0.0));
        // Window 3 (bottom-right) has 4 regions of sizes 16, 12, 12, 9 -> entries that are 0
        // are 16^2 + 12^2 + 12^2 + 9^2.
        let zeros = mask[3 * n * n..].iter().filter(|&&v| v == 0.0).count();
        assert_eq!(zeros, 16 * 16 + 12 * 12 * 2 + 9 * 9);
    }

    #[test]
    fn odd_sizes_pad_bottom_right() {
        // 333x250 pixels, patch 4 -> 84x63 tokens (ceil), input padded to 336x252.
        let g = Geometry::new(
            (333, 250),
            &tiny_shape(7),
            sem(PadOrder::PadThenShift, SmallStage::Clamp),
        );
        assert_eq!(g.input_padded, (336, 252));
        assert_eq!(g.embed_grid(), (84, 63));
        let grids: Vec<_> = g.stages.iter().map(|s| s.grid).collect();
        assert_eq!(grids, vec![(84, 63), (42, 32), (21, 16), (11, 8)]);
        // 42x32 with window 7 pads to 42x35.
        assert_eq!(g.stages[1].blocks[0].padded(), (42, 35));
        assert_eq!(g.stages[3].blocks[0].window(), (7, 7));
        assert_eq!(g.stages[3].blocks[0].padded(), (14, 14));
    }

    #[test]
    fn small_stage_policies() {
        let shape = tiny_shape(7);
        // 224x96 -> stage grids 56x24, 28x12, 14x6, 7x3.
        let per_axis = Geometry::new(
            (224, 96),
            &shape,
            sem(PadOrder::ShiftThenPad, SmallStage::ClampPerAxis),
        );
        let b = &per_axis.stages[2].blocks[1];
        assert_eq!(b.window(), (7, 6));
        assert_eq!(b.shift(), (3, 0));
        let b = &per_axis.stages[3].blocks[1];
        assert_eq!((b.window(), b.shift()), ((7, 3), (0, 0)));

        let clamp = Geometry::new(
            (224, 96),
            &shape,
            sem(PadOrder::PadThenShift, SmallStage::Clamp),
        );
        let b = &clamp.stages[2].blocks[1];
        assert_eq!((b.window(), b.shift()), ((6, 6), (0, 0)));
        assert_eq!(b.padded(), (18, 6));

        let up = Geometry::new(
            (224, 96),
            &shape,
            sem(PadOrder::PadThenShift, SmallStage::PadUp),
        );
        let b = &up.stages[3].blocks[1];
        assert_eq!(
            (b.window(), b.shift(), b.padded()),
            ((7, 7), (3, 3), (7, 7))
        );
    }

    // transformers 5.23.0 Swinv2Backbone built for image_size 64 (window 8, patch 4) and run on
    // 101x77 (tests/fixtures/tfv2_backbone_odd, read off the library's layers): construction
    // grids 16, 8, 4, 2 give windows 8 (shift 4), 8 (no shift), 4 and 2; every stage is padded
    // up to its window.
    #[test]
    fn as_built_windows_come_from_the_built_size() {
        let shape = ModelShape {
            patch: 4,
            depths: vec![2, 2, 2, 2],
            window: (8, 8),
            built_for: Some((64, 64)),
        };
        let g = Geometry::new(
            (77, 101),
            &shape,
            sem(PadOrder::PadThenShift, SmallStage::AsBuilt),
        );
        let got: Vec<_> = g
            .stages
            .iter()
            .map(|s| {
                (
                    s.grid,
                    s.blocks[1].window(),
                    s.blocks[1].shift(),
                    s.padded(),
                )
            })
            .collect();
        assert_eq!(
            got,
            vec![
                ((20, 26), (8, 8), (4, 4), (24, 32)),
                ((10, 13), (8, 8), (0, 0), (16, 16)),
                ((5, 7), (4, 4), (0, 0), (8, 8)),
                ((3, 4), (2, 2), (0, 0), (4, 4)),
            ]
        );
    }

    fn check_inverse(b: &BlockGeometry) {
        let gather = b.gather_index();
        let scatter = b.scatter_index();
        let real = (b.rows.len * b.cols.len) as u32;
        // Every real token appears exactly once in the window batch, and scatter finds it there.
        let mut seen = vec![0usize; real as usize];
        for &g in &gather {
            if g < real {
                seen[g as usize] += 1;
            }
        }
        assert!(seen.iter().all(|&c| c == 1));
        for (t, &slot) in scatter.iter().enumerate() {
            assert_eq!(gather[slot as usize], t as u32);
        }
        assert_eq!(gather.len(), b.rows.padded * b.cols.padded);
    }

    #[test]
    fn gather_and_scatter_are_inverse_in_both_orders() {
        for order in [PadOrder::PadThenShift, PadOrder::ShiftThenPad] {
            for (len_r, len_c) in [(14, 14), (13, 9), (5, 11), (3, 3)] {
                for shift in [0, 3] {
                    let b = BlockGeometry {
                        rows: AxisPlan::new(len_r, 7, shift, order),
                        cols: AxisPlan::new(len_c, 7, shift, order),
                    };
                    check_inverse(&b);
                }
            }
        }
    }

    // torch.roll(x, -s) puts x[(i + s) mod n] at i; pad-then-shift rolls the padded map,
    // shift-then-pad rolls only the real tokens and appends padding after them.
    #[test]
    fn roll_semantics_match_torch_roll() {
        let a = AxisPlan::new(5, 7, 3, PadOrder::PadThenShift);
        let src: Vec<_> = (0..7).map(|i| a.source_of_slot(i)).collect();
        assert_eq!(
            src,
            vec![Some(3), Some(4), None, None, Some(0), Some(1), Some(2)]
        );
        let b = AxisPlan::new(5, 7, 3, PadOrder::ShiftThenPad);
        let src: Vec<_> = (0..7).map(|i| b.source_of_slot(i)).collect();
        assert_eq!(
            src,
            vec![Some(3), Some(4), Some(0), Some(1), Some(2), None, None]
        );
        for p in 0..7 {
            assert_eq!(a.source_of_slot(a.slot_of(p)), (p < 5).then_some(p));
            assert_eq!(b.source_of_slot(b.slot_of(p)), (p < 5).then_some(p));
        }
    }

    #[test]
    fn pieces_tile_the_padded_grid() {
        let b = BlockGeometry {
            rows: AxisPlan::new(13, 7, 3, PadOrder::ShiftThenPad),
            cols: AxisPlan::new(9, 7, 3, PadOrder::PadThenShift),
        };
        let area: usize = b
            .pieces()
            .iter()
            .map(|p| (p.row1 - p.row0) * (p.col1 - p.col0))
            .sum();
        assert_eq!(area, 14 * 14);
        // Every token of a piece reports the piece's window.
        for piece in b.pieces() {
            for r in piece.row0..piece.row1 {
                for c in piece.col0..piece.col1 {
                    assert_eq!(b.window_of(r, c).0, piece.window);
                }
            }
        }
    }

    #[test]
    fn merge_order_and_padding() {
        let (idx, out) = merge_index((3, 3));
        assert_eq!(out, (2, 2));
        assert_eq!(&idx[..4], &[0, 3, 1, 4]);
        // Bottom-right output token: only x[2,2] is real.
        assert_eq!(&idx[12..], &[8, 9, 9, 9]);
    }

    #[test]
    fn footprint_clips_to_image() {
        let g = Geometry::new(
            (97, 160),
            &tiny_shape(7),
            sem(PadOrder::PadThenShift, SmallStage::Clamp),
        );
        let s = &g.stages[1]; // stride 8
        assert_eq!(s.footprint(0, 0, g.image), [0, 8, 0, 8]);
        assert_eq!(s.footprint(12, 19, g.image), [96, 97, 152, 160]);
    }
}
