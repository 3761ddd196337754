//! The maps and panel pictures on screen, made off the GUI thread.
//!
//! Two keys decide what work a change needs: a [`MapKey`] (which result, which map kind, which
//! scaling) changes the maps themselves (PCA refits, percentiles), a [`DrawKey`] (colour map,
//! grids, opacity, lens stage) only the pictures drawn from them. A job on its own thread does
//! whichever is needed and sends the result back; the GUI thread only uploads textures. When the
//! maps key changes the old pictures are dropped at once, so an old map is never shown under a
//! new caption; when only the drawing changes the old pictures stay until the new ones arrive.

use super::settings::Settings;
use crate::analysis::compare::{pair_problem, prepare_pair_view, DifferenceStage, PairView};
use crate::analysis::padding::{size_advice, stage_profiles, StageProfiles};
use crate::analysis::{
    parse_map_kind, prepare_stage_pair, rank_channels, Colormap, Map, PreparedStage, ScaleSpec,
};
use crate::engine::geometry::ModelShape;
use crate::engine::StageOutputs;
use crate::error::{Error, Result};
use crate::render::{self, Overlays, PanelStyle};
use egui::{TextureHandle, TextureOptions};
use image::{RgbImage, RgbaImage};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{channel, Receiver, TryRecvError};
use std::sync::Arc;

/// How many channels the controls offer as the strongest of a stage.
pub const RANKED_CHANNELS: usize = 8;

/// The name of the thread that prepares maps and draws panels.
pub const THREAD_NAME: &str = "mullion-pictures";

/// What the maps depend on.
#[derive(Clone, Debug, PartialEq)]
pub struct MapKey {
    /// The result (image, checkpoint, input policy, normalisation).
    pub run: String,
    /// The base checkpoint's result for the same image, when comparing.
    pub base_run: Option<String>,
    /// The second pass of the same checkpoint a padding study needs (padded input, other
    /// pad order, every block's attention).
    pub variant_run: Option<String>,
    /// The map kind's id (`norm`, `channel:4`, `pca`).
    pub map: String,
    pub spec: ScaleSpec,
}

/// The forward passes the maps are made from, each with the key it was cached under.
#[derive(Clone, Copy)]
pub struct Passes<'a> {
    pub run: &'a str,
    pub outputs: &'a Arc<StageOutputs>,
    /// The base checkpoint's pass of the same image, when comparing.
    pub base: Option<(&'a str, &'a Arc<StageOutputs>)>,
    /// The second pass of the same checkpoint the chosen padding study needs.
    pub variant: Option<(&'a str, &'a Arc<StageOutputs>)>,
    /// The checkpoint's shape, for the size advice.
    pub shape: Option<&'a ModelShape>,
}

/// What the pictures drawn from the maps depend on, beyond the maps. Window grids and the
/// padding hatch are not in the pictures: they are drawn on screen over them (see
/// `app::overlay`), so toggling them redraws nothing.
#[derive(Clone, Debug, PartialEq)]
pub struct DrawKey {
    pub colormap: Colormap,
    pub opacity: f32,
    /// The stage drawn large in the lens.
    pub focus: usize,
}

impl MapKey {
    pub fn of(passes: &Passes, s: &Settings) -> MapKey {
        MapKey {
            run: passes.run.to_string(),
            base_run: passes.base.map(|b| b.0.to_string()),
            variant_run: passes.variant.map(|v| v.0.to_string()),
            map: s.map_id(),
            spec: s.scale_spec(),
        }
    }
}

impl DrawKey {
    pub fn of(s: &Settings, n_stages: usize) -> DrawKey {
        DrawKey {
            colormap: Colormap::parse(&s.colormap).unwrap_or_default(),
            opacity: s.opacity.clamp(0.0, 1.0),
            focus: s.focus_stage.min(n_stages.saturating_sub(1)),
        }
    }

    /// The picture style at `scale` output pixels per input pixel: the map over the image,
    /// padding as a plain fill, no grid.
    pub fn style(&self, scale: f32) -> PanelStyle {
        PanelStyle {
            colormap: self.colormap,
            opacity: self.opacity,
            overlays: Overlays {
                regular_grid: false,
                shifted_grid: false,
                padding: false,
                ..Overlays::default()
            },
            scale,
        }
    }
}

/// Every stage's map of one result, raw and ready to draw.
pub struct PreparedMaps {
    /// Unique per preparation, so derived numbers (region statistics) know when to recompute.
    pub id: u64,
    pub key: MapKey,
    pub outputs: Arc<StageOutputs>,
    /// The network input the maps belong to.
    pub input: Arc<RgbImage>,
    /// Size of the image as opened (before any input policy), width x height.
    pub image_size: (u32, u32),
    /// Raw values per stage (for the read-out and statistics).
    pub raw: Vec<Map>,
    /// Scaled for display, with legend ranges or PCA variance shares.
    pub stages: Vec<PreparedStage>,
    pub map_id: String,
    pub map_label: String,
    /// Per stage, the channels with the largest mean, largest first.
    pub ranking: Vec<Vec<(usize, f32)>>,
    /// The thread the preparation ran on (the GUI thread never prepares maps).
    pub made_on: String,
    /// The base checkpoint's (A's) pass of the same image, when comparing.
    pub base_outputs: Option<Arc<StageOutputs>>,
    /// A's and B's maps, the difference and CKA per stage, when comparing.
    pub pair: Option<PairView>,
    /// Why the two passes cannot be compared token by token, when they cannot.
    pub pair_problem: Option<String>,
    /// Per stage, the map's window-position and border profiles (scalar maps only).
    pub profiles: Vec<Option<StageProfiles>>,
    /// The padding every stage gets at this input size and the nearest sizes that need none.
    pub size_advice: Option<String>,
}

impl PreparedMaps {
    /// Factors from image pixels (where regions are marked) to network-input pixels.
    pub fn image_to_input(&self) -> (f64, f64) {
        let (w, h) = self.image_size;
        (
            self.input.width() as f64 / w.max(1) as f64,
            self.input.height() as f64 / h.max(1) as f64,
        )
    }

    /// The raw value (scalar) or colour of token (row, col) of `stage`, if it is a real token.
    pub fn value_at(&self, stage: usize, row: usize, col: usize) -> Option<String> {
        let map = self.raw.get(stage)?;
        let (rows, cols) = map.dims();
        if row >= rows || col >= cols {
            return None;
        }
        let i = row * cols + col;
        describe_value(map, i)
    }

    /// When comparing: A's and B's raw values of the rows' kind and the cosine of token
    /// (row, col) of `stage`.
    pub fn pair_at(&self, stage: usize, row: usize, col: usize) -> Option<String> {
        let pair = self.pair.as_ref()?;
        let (rows, cols) = pair.a_raw.get(stage)?.dims();
        if row >= rows || col >= cols {
            return None;
        }
        let i = row * cols + col;
        let (a, b) = (
            describe_value(pair.a_raw.get(stage)?, i)?,
            describe_value(pair.b_raw.get(stage)?, i)?,
        );
        let cos = pair
            .cosine_at(stage, row, col)
            .map_or("no cosine (widths differ)".to_string(), |c| {
                format!("cosine {c:.4}")
            });
        Some(format!("A {a}, B {b}, {cos}"))
    }
}

/// Token `i` of a map as text.
fn describe_value(map: &Map, i: usize) -> Option<String> {
    Some(match map {
        Map::Scalar { values, .. } => format!("value {:.4}", values.get(i)?),
        Map::Rgb { values, .. } => {
            let v = values.get(i)?;
            format!("rgb {:.2} {:.2} {:.2}", v[0], v[1], v[2])
        }
    })
}

/// The comparison pictures of one draw: per stage A's map, B's map (one legend for both) and
/// the difference map with its legend (`None` where a stage has no difference map).
pub struct PairDrawn {
    pub a: Vec<RgbaImage>,
    pub b: Vec<RgbaImage>,
    pub ab_legends: Vec<RgbaImage>,
    pub difference: Vec<Option<RgbaImage>>,
    pub difference_legends: Vec<Option<RgbaImage>>,
}

/// [`PairDrawn`] as textures.
pub struct PairTextures {
    pub a: Vec<TextureHandle>,
    pub b: Vec<TextureHandle>,
    pub ab_legends: Vec<TextureHandle>,
    pub difference: Vec<Option<TextureHandle>>,
    pub difference_legends: Vec<Option<TextureHandle>>,
}

/// The pictures of one draw, as pixels (made on the job thread).
pub struct Drawn {
    pub key: DrawKey,
    pub image: RgbaImage,
    pub strip: Vec<RgbaImage>,
    pub lens: Option<RgbaImage>,
    pub lens_scale: f32,
    pub legends: Vec<RgbaImage>,
    pub pair: Option<PairDrawn>,
}

/// The pictures of one draw, as textures.
pub struct Textures {
    pub key: DrawKey,
    pub image: TextureHandle,
    pub strip: Vec<TextureHandle>,
    pub lens: Option<TextureHandle>,
    pub legends: Vec<TextureHandle>,
    pub pair: Option<PairTextures>,
}

/// How often each kind of work ran (for the tests that check what a change costs).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct WorkCount {
    pub maps_prepared: u64,
    pub pictures_drawn: u64,
}

type JobResult = Result<(Arc<PreparedMaps>, Drawn)>;

/// This checkpoint's pass, the base's and the padding study's, owned by the job.
type OwnedPasses = (
    Arc<StageOutputs>,
    Option<Arc<StageOutputs>>,
    Option<Arc<StageOutputs>>,
    Option<ModelShape>,
);

struct Job {
    map_key: MapKey,
    draw_key: DrawKey,
    rx: Receiver<JobResult>,
}

#[derive(Default)]
pub struct Pictures {
    /// The maps on screen (or about to be: their textures may still be uploading).
    pub maps: Option<Arc<PreparedMaps>>,
    pub textures: Option<Textures>,
    /// Why there are no maps, when preparing them failed.
    pub problem: Option<String>,
    pub work: WorkCount,
    job: Option<Job>,
    upload: Option<Drawn>,
    /// The maps key whose preparation failed last (not retried until something changes).
    failed: Option<MapKey>,
}

/// The lens's output pixels per input pixel: whole steps, so the lens picture stays sharp.
pub fn lens_scale(input: &RgbImage) -> f32 {
    (768.0 / input.width().max(input.height()).max(1) as f32)
        .clamp(1.0, 4.0)
        .floor()
}

fn next_id() -> u64 {
    static NEXT: AtomicU64 = AtomicU64::new(1);
    NEXT.fetch_add(1, Ordering::Relaxed)
}

/// A legend picture for a prepared stage.
fn legend_of(st: &PreparedStage, colormap: Colormap) -> RgbaImage {
    match &st.range {
        Some(r) => render::render_legend(colormap, r, 240, 40),
        None => render::render_rgb_legend(st.explained.as_deref(), 240, 40),
    }
}

/// Draw the comparison rows.
fn draw_pair(
    pair: &PairView,
    input: &RgbImage,
    g: &crate::engine::geometry::Geometry,
    draw_key: &DrawKey,
) -> Result<PairDrawn> {
    let style = draw_key.style(1.0);
    let row = |stages: &[PreparedStage]| -> Result<Vec<RgbaImage>> {
        stages
            .iter()
            .map(|st| render::render_panel(input, &st.map, g, st.stage, &style))
            .collect()
    };
    let mut difference = Vec::new();
    let mut difference_legends = Vec::new();
    for d in &pair.difference {
        match d {
            DifferenceStage::Shown { prepared, .. } => {
                difference.push(Some(render::render_panel(
                    input,
                    &prepared.map,
                    g,
                    prepared.stage,
                    &style,
                )?));
                difference_legends.push(Some(legend_of(prepared, draw_key.colormap)));
            }
            DifferenceStage::Absent(_) => {
                difference.push(None);
                difference_legends.push(None);
            }
        }
    }
    Ok(PairDrawn {
        a: row(&pair.a)?,
        b: row(&pair.b)?,
        ab_legends: pair
            .a
            .iter()
            .map(|st| legend_of(st, draw_key.colormap))
            .collect(),
        difference,
        difference_legends,
    })
}

/// Prepare (unless `reuse` already has them) and draw, on the job thread.
fn work(
    (outputs, base, variant, shape): OwnedPasses,
    input: Arc<RgbImage>,
    image_size: (u32, u32),
    map_key: MapKey,
    draw_key: DrawKey,
    reuse: Option<Arc<PreparedMaps>>,
) -> JobResult {
    let maps = match reuse {
        Some(m) => m,
        None => {
            map_key.spec.validate()?;
            let kind = parse_map_kind(&map_key.map)?;
            let problem = base.as_ref().and_then(|b| pair_problem(b, &outputs));
            // The pair is A (base) and B (this checkpoint); a kind that compares needs both.
            let compared = base.as_deref().filter(|_| problem.is_none());
            if kind.needs_pair() && compared.is_none() {
                return Err(Error::BadArgument(problem.unwrap_or_else(|| {
                    "this map compares two checkpoints: open a base checkpoint (A) first".into()
                })));
            }
            // A padding study's second pass is of this checkpoint; the difference's is A's.
            let other = match kind.variant() {
                Some(_) => variant.as_deref(),
                None => compared,
            };
            let (raw, stages) = prepare_stage_pair(&outputs, other, kind.as_ref(), &map_key.spec)?;
            let profiles = raw
                .iter()
                .zip(&outputs.geometry.stages)
                .map(|(m, sg)| m.scalars().map(|v| stage_profiles(v, sg)).transpose())
                .collect::<Result<Vec<_>>>()?;
            let pair = compared
                .map(|b| prepare_pair_view(b, &outputs, kind.as_ref(), &map_key.spec))
                .transpose()?;
            let ranking = (0..outputs.stages.len())
                .map(|s| {
                    rank_channels(&outputs, s)
                        .map(|r| r.into_iter().take(RANKED_CHANNELS).collect())
                })
                .collect::<Result<_>>()?;
            Arc::new(PreparedMaps {
                id: next_id(),
                key: map_key,
                outputs: outputs.clone(),
                input: input.clone(),
                image_size,
                raw,
                stages,
                map_id: kind.id(),
                map_label: kind.label(),
                ranking,
                made_on: std::thread::current().name().unwrap_or("").to_string(),
                base_outputs: base.clone(),
                pair,
                pair_problem: problem,
                profiles,
                size_advice: shape.map(|sh| {
                    let g = &outputs.geometry;
                    size_advice(g.image, &sh, g.semantics, crate::render::MAX_SIDE as usize).text()
                }),
            })
        }
    };
    let g = &outputs.geometry;
    let strip_style = draw_key.style(1.0);
    let strip = maps
        .stages
        .iter()
        .map(|st| render::render_panel(&input, &st.map, g, st.stage, &strip_style))
        .collect::<Result<Vec<_>>>()?;
    let scale = lens_scale(&input);
    let lens = maps
        .stages
        .get(draw_key.focus)
        .map(|st| render::render_panel(&input, &st.map, g, st.stage, &draw_key.style(scale)))
        .transpose()?;
    let legends = maps
        .stages
        .iter()
        .map(|st| legend_of(st, draw_key.colormap))
        .collect();
    let pair = maps
        .pair
        .as_ref()
        .map(|p| draw_pair(p, &input, g, &draw_key))
        .transpose()?;
    let image = image::DynamicImage::ImageRgb8((*input).clone()).to_rgba8();
    Ok((
        maps,
        Drawn {
            key: draw_key,
            image,
            strip,
            lens,
            lens_scale: scale,
            legends,
            pair,
        },
    ))
}

fn to_color_image(img: &RgbaImage) -> egui::ColorImage {
    egui::ColorImage::from_rgba_unmultiplied(
        [img.width() as usize, img.height() as usize],
        img.as_raw(),
    )
}

impl Pictures {
    /// Whether a job is running.
    pub fn is_busy(&self) -> bool {
        self.job.is_some()
    }

    /// Whether pictures wait to be turned into textures (the next frame does it).
    pub fn has_upload(&self) -> bool {
        self.upload.is_some()
    }

    /// Drop everything (no result to show).
    pub fn clear(&mut self) {
        self.maps = None;
        self.textures = None;
        self.problem = None;
        self.job = None;
        self.upload = None;
    }

    /// Ask for the pictures of `outputs` under `settings`; starts a job when something changed.
    /// `wake` is called when the job is done (the window passes a repaint request).
    pub fn want(
        &mut self,
        passes: Passes,
        input: &Arc<RgbImage>,
        image_size: (u32, u32),
        settings: &Settings,
        wake: Option<Box<dyn Fn() + Send>>,
    ) {
        let outputs = passes.outputs;
        let map_key = MapKey::of(&passes, settings);
        let draw_key = DrawKey::of(settings, outputs.stages.len());
        if self
            .job
            .as_ref()
            .is_some_and(|j| j.map_key == map_key && j.draw_key == draw_key)
        {
            return;
        }
        let maps_current = self.maps.as_ref().is_some_and(|m| m.key == map_key);
        let drawn_key = self
            .upload
            .as_ref()
            .map(|d| &d.key)
            .or(self.textures.as_ref().map(|t| &t.key));
        if maps_current && drawn_key == Some(&draw_key) {
            self.job = None;
            return;
        }
        if !maps_current {
            if self.problem.is_some() && self.job.is_none() && self.failed_for(&map_key) {
                return; // the same request failed already; it is on screen why
            }
            // Other maps: nothing of the old ones may stay on screen.
            self.maps = None;
            self.textures = None;
            self.upload = None;
        }
        self.problem = None;
        let reuse = if maps_current {
            self.maps.clone()
        } else {
            None
        };
        let (tx, rx) = channel();
        let base = passes.base.map(|b| b.1.clone());
        let variant = passes.variant.map(|v| v.1.clone());
        let shape = passes.shape.cloned();
        let (o, i, mk, dk) = (
            outputs.clone(),
            input.clone(),
            map_key.clone(),
            draw_key.clone(),
        );
        let spawned = std::thread::Builder::new()
            .name(THREAD_NAME.into())
            .spawn(move || {
                let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    work((o, base, variant, shape), i, image_size, mk, dk, reuse)
                }))
                .unwrap_or_else(|_| Err(Error::Internal("preparing the maps panicked".into())));
                let _ = tx.send(r);
                if let Some(w) = wake {
                    w();
                }
            });
        match spawned {
            Ok(_) => {
                self.failed = None;
                self.job = Some(Job {
                    map_key,
                    draw_key,
                    rx,
                })
            }
            Err(e) => self.problem = Some(format!("cannot start preparing the maps: {e}")),
        }
    }

    fn failed_for(&self, key: &MapKey) -> bool {
        self.failed.as_ref() == Some(key)
    }

    /// Take a finished job's result; an error message when preparing failed.
    pub fn poll(&mut self) -> Option<String> {
        let job = self.job.as_ref()?;
        let result = match job.rx.try_recv() {
            Ok(r) => r,
            Err(TryRecvError::Empty) => return None,
            Err(TryRecvError::Disconnected) => {
                Err(Error::Internal("the map thread stopped".into()))
            }
        };
        let job = self.job.take().expect("checked");
        match result {
            Ok((maps, drawn)) => {
                if self.maps.as_ref().is_none_or(|m| m.id != maps.id) {
                    self.work.maps_prepared += 1;
                }
                self.work.pictures_drawn += 1;
                self.maps = Some(maps);
                self.upload = Some(drawn);
                None
            }
            Err(e) => {
                let msg = format!("no maps for {}: {e}", job.map_key.map);
                self.maps = None;
                self.textures = None;
                self.upload = None;
                self.failed = Some(job.map_key);
                self.problem = Some(msg.clone());
                Some(msg)
            }
        }
    }

    /// Turn finished pictures into textures (GUI thread; only copies pixels).
    pub fn upload(&mut self, ctx: &egui::Context) {
        let Some(d) = self.upload.take() else { return };
        let tex =
            |name: String, img: &RgbaImage, opts| ctx.load_texture(name, to_color_image(img), opts);
        self.textures = Some(Textures {
            image: tex("input".into(), &d.image, TextureOptions::NEAREST),
            strip: d
                .strip
                .iter()
                .enumerate()
                .map(|(i, img)| tex(format!("stage{i}"), img, TextureOptions::NEAREST))
                .collect(),
            lens: d
                .lens
                .as_ref()
                .map(|img| tex("lens".into(), img, TextureOptions::NEAREST)),
            legends: d
                .legends
                .iter()
                .enumerate()
                .map(|(i, img)| tex(format!("legend{i}"), img, TextureOptions::LINEAR))
                .collect(),
            pair: d.pair.as_ref().map(|p| {
                let row = |prefix: &str, imgs: &[RgbaImage], opts| {
                    imgs.iter()
                        .enumerate()
                        .map(|(i, img)| tex(format!("{prefix}{i}"), img, opts))
                        .collect::<Vec<_>>()
                };
                let opt_row = |prefix: &str, imgs: &[Option<RgbaImage>], opts| {
                    imgs.iter()
                        .enumerate()
                        .map(|(i, img)| img.as_ref().map(|m| tex(format!("{prefix}{i}"), m, opts)))
                        .collect::<Vec<_>>()
                };
                PairTextures {
                    a: row("a-stage", &p.a, TextureOptions::NEAREST),
                    b: row("b-stage", &p.b, TextureOptions::NEAREST),
                    ab_legends: row("ab-legend", &p.ab_legends, TextureOptions::LINEAR),
                    difference: opt_row("diff-stage", &p.difference, TextureOptions::NEAREST),
                    difference_legends: opt_row(
                        "diff-legend",
                        &p.difference_legends,
                        TextureOptions::LINEAR,
                    ),
                }
            }),
            key: d.key,
        });
    }

    /// The maps and their textures, when both are on screen.
    pub fn on_screen(&self) -> Option<(&PreparedMaps, &Textures)> {
        Some((self.maps.as_deref()?, self.textures.as_ref()?))
    }

    /// The stage the lens picture shows, when there is one.
    pub fn lens_stage(&self) -> Option<usize> {
        self.textures
            .as_ref()
            .filter(|t| t.lens.is_some())
            .map(|t| t.key.focus)
    }
}
