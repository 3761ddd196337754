//! The one renderer for the window and for saved files: stage panels (a map over the image,
//! window grids, hatched padding), legends, text and the composed figure.
//!
//! The window shows exactly what a saved figure shows because both draw through here. Maps
//! arrive prepared by `analysis`; window borders come from the engine's geometry.

pub mod figure;
pub mod legend;
pub mod pair;
pub mod panel;
pub mod profile;
pub mod spotlight;
pub mod text;

pub use figure::{
    annotate_regions, compose_figure, default_figure_scale, figure_panel_style, figure_text_px,
    outline_regions, scale_note, stack_figures, text_figure, FigureSpec, PCA_NOTE,
};
pub use legend::{format_tick, linear_ticks, log_ticks, render_legend, render_rgb_legend};
pub use pair::{compose_pair_figure, pair_summary_lines, PairFigureSpec};
pub use panel::{
    blend, border_px, canvas_size, is_hatch, line_width_for_scale, render_map_only, render_panel,
    to_px, window_borders, Border, GridKind, Overlays, PanelStyle, BACKGROUND, HATCH_PERIOD, INK,
    MAX_SIDE, PADDING_FILL, PADDING_HATCH, REGULAR_GRID, SHIFTED_GRID,
};
pub use text::{draw_text, line_height, text_width, wrap_text};
