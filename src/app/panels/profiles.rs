//! The seams and border window: for the stage in the lens, the map's mean per position inside
//! the window (regular and shifted blocks, one colour scale for both and the border chart) and
//! its mean against the distance in tokens to the padded border. Seams between windows show as
//! edges in the grids; an effect of the padding shows as a slope near distance 0.

use crate::analysis::padding::{ProfileBin, StageProfiles, PADDING_CAUTION};
use crate::analysis::Colormap;
use crate::app::actions::Action;
use crate::app::state::Workbench;
use crate::render::profile::profile_range;
use egui::{Color32, Pos2, Rect, Sense, Stroke, Vec2};

#[derive(Default)]
pub struct ProfilesPanel;

fn colour(cm: Colormap, t: f64) -> Color32 {
    let c = cm.lookup_u8(t.clamp(0.0, 1.0) as f32);
    Color32::from_rgb(c[0], c[1], c[2])
}

fn norm((lo, hi): (f64, f64), v: f64) -> f64 {
    if hi > lo {
        (v - lo) / (hi - lo)
    } else {
        0.5
    }
}

/// One window-position grid; the value under the pointer is returned.
fn grid(
    ui: &mut egui::Ui,
    name: &str,
    w: Option<&((usize, usize), Vec<ProfileBin>)>,
    range: (f64, f64),
    cm: Colormap,
) -> Option<String> {
    ui.vertical(|ui| {
        ui.small(name);
        let Some(((wh, ww), bins)) = w else {
            ui.small("none in this stage");
            return None;
        };
        let cell = (150.0 / (*wh).max(*ww) as f32).clamp(8.0, 24.0);
        let (resp, painter) = ui.allocate_painter(
            Vec2::new(cell * *ww as f32, cell * *wh as f32),
            Sense::hover(),
        );
        resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, name));
        painter.rect_filled(resp.rect, 0.0, Color32::from_gray(30));
        let mut hovered = None;
        for b in bins {
            let r = Rect::from_min_size(
                resp.rect.min + Vec2::new(b.at.1 as f32 * cell, b.at.0 as f32 * cell),
                Vec2::splat(cell),
            )
            .shrink(0.5);
            painter.rect_filled(r, 0.0, colour(cm, norm(range, b.mean)));
            if resp.hover_pos().is_some_and(|p| r.contains(p)) {
                hovered = Some(format!(
                    "{name}: position ({}, {}) mean {:.4} over {} tokens",
                    b.at.0, b.at.1, b.mean, b.tokens
                ));
            }
        }
        hovered
    })
    .inner
}

fn border(
    ui: &mut egui::Ui,
    bins: &[ProfileBin],
    range: (f64, f64),
    cm: Colormap,
) -> Option<String> {
    ui.vertical(|ui| {
        ui.small("by distance to the border (tokens)");
        let n = bins.len().clamp(1, 32);
        let bar = 10.0;
        let (resp, painter) =
            ui.allocate_painter(Vec2::new(bar * n as f32 + 2.0, 150.0), Sense::hover());
        resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, "border profile"));
        let rect = resp.rect;
        painter.rect_filled(rect, 0.0, Color32::from_gray(30));
        let mut hovered = None;
        for (i, b) in bins.iter().take(n).enumerate() {
            let t = norm(range, b.mean);
            let h = (t.clamp(0.0, 1.0) as f32 * (rect.height() - 4.0)).max(1.0);
            let r = Rect::from_min_max(
                Pos2::new(rect.min.x + 1.0 + i as f32 * bar, rect.max.y - 2.0 - h),
                Pos2::new(rect.min.x + (i + 1) as f32 * bar, rect.max.y - 2.0),
            );
            painter.rect_filled(r, 0.0, colour(cm, t));
            let column = Rect::from_x_y_ranges(r.x_range(), rect.y_range());
            if resp.hover_pos().is_some_and(|p| column.contains(p)) {
                painter.rect_stroke(
                    r,
                    0.0,
                    Stroke::new(1.0, Color32::WHITE),
                    egui::StrokeKind::Outside,
                );
                hovered = Some(format!(
                    "distance {}: mean {:.4} over {} tokens",
                    b.at.0, b.mean, b.tokens
                ));
            }
        }
        hovered
    })
    .inner
}

impl ProfilesPanel {
    pub fn ui(&mut self, ui: &mut egui::Ui, bench: &Workbench) -> Vec<Action> {
        let mut open = true;
        egui::Window::new("Seams and border")
            .open(&mut open)
            .default_size([560.0, 320.0])
            // Below the top bar and left of the regions panel, never over the buttons.
            .default_pos([300.0, 240.0])
            .show(ui.ctx(), |ui| contents(ui, bench));
        if open {
            Vec::new()
        } else {
            vec![Action::ShowProfiles(false)]
        }
    }
}

fn contents(ui: &mut egui::Ui, bench: &Workbench) {
    let Some((maps, tex)) = bench.pictures.on_screen() else {
        ui.label("no maps on screen");
        return;
    };
    let stage = tex.key.focus;
    let Some(p): Option<&StageProfiles> = maps.profiles.get(stage).and_then(Option::as_ref) else {
        ui.label("profiles need a scalar map (not PCA colours)");
        return;
    };
    let cm = tex.key.colormap;
    let range = profile_range(p);
    ui.label(format!(
        "stage {stage} (the lens stage): {}",
        maps.map_label
    ));
    let mut hover = None;
    ui.horizontal(|ui| {
        hover = grid(ui, "regular windows", p.regular.as_ref(), range, cm)
            .or(grid(ui, "shifted windows", p.shifted.as_ref(), range, cm))
            .or(border(ui, &p.border, range, cm));
    });
    ui.small(format!(
        "one scale for all three: {:.4} … {:.4}; mean of the map per position inside the \
         window, and against the distance to the bottom/right padded border",
        range.0, range.1
    ));
    ui.small(hover.unwrap_or_else(|| "point at a cell or bar to read it".into()));
    ui.small(PADDING_CAUTION);
}
