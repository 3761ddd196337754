//! The padding and seam study of one image (`mullion padding`): the padding sweep, the
//! pad-order disagreement, the attention on padding keys, the window-position and border
//! profiles of those maps, and the size advice, written to one folder; optional figures of
//! every map through the shared renderer.
//!
//! Output folder: `sweep.csv` (`pad_px,stage,mean_cosine,min_cosine,tokens`), `orders.csv`
//! (`stage,max_rel_diff,share_over_1e-3`), `pad_attention.csv`
//! (`stage,block,mean_share,max_share`), `profile.csv`
//! (`map,stage,profile,row,col,distance,mean,tokens`), `sizes.txt`, and with figures
//! `figures/<stem>.<map>.figure.png`. The folder is locked for the run.

use crate::analysis::padding::{
    all_attention_bytes, border_profile, order_disagreement, orders::ordered, pad_attention_stats,
    pad_input, size_advice, sweep_cosines, variant_options, window_profile, AttentionOnPadding,
    OrderDisagreement, PadShareStats, PaddingSensitivity, Variant, MAX_PAD_PX, PADDING_CAUTION,
};
use crate::analysis::{prepare_stage_pair, stage_tokens, Colormap, Map, MapKind, ScaleSpec};
use crate::engine::input::{load_image, MAX_SIDE};
use crate::engine::model::check_budget;
use crate::engine::{ForwardOptions, Session, SessionOptions, StageOutputs};
use crate::error::{Error, Result};
use crate::io::write_text_atomic;
use crate::render::{self, FigureSpec, Overlays};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

pub const SWEEP_NAME: &str = "sweep.csv";
pub const ORDERS_NAME: &str = "orders.csv";
pub const PAD_ATTENTION_NAME: &str = "pad_attention.csv";
pub const PROFILE_NAME: &str = "profile.csv";
pub const SIZES_NAME: &str = "sizes.txt";
pub const FIGURES_DIR: &str = "figures";
/// The pads (pixels) studied when none are given.
pub const DEFAULT_PADS: [usize; 4] = [0, 8, 16, 32];

/// What a padding study needs, typed.
#[derive(Clone, Debug)]
pub struct PaddingOptions {
    pub session: SessionOptions,
    pub image: PathBuf,
    pub out: PathBuf,
    /// Extra zero rows and columns, in pixels, one sweep row set each.
    pub pads: Vec<usize>,
    pub figures: bool,
}

/// One row of `sweep.csv`.
#[derive(Clone, Debug, PartialEq)]
pub struct SweepRow {
    pub pad_px: usize,
    pub stage: usize,
    /// `None` when the padded pass could not run (see [`PaddingOutcome::skipped`]).
    pub mean_cosine: Option<f64>,
    pub min_cosine: Option<f64>,
    pub tokens: usize,
}

/// One row of `orders.csv`.
#[derive(Clone, Debug, PartialEq)]
pub struct OrderRow {
    pub stage: usize,
    pub max_rel_diff: f64,
    pub share_over: f64,
}

/// What the study found and wrote.
#[derive(Clone, Debug)]
pub struct PaddingOutcome {
    pub sweep: Vec<SweepRow>,
    pub orders: Vec<OrderRow>,
    pub attention: Vec<PadShareStats>,
    pub files: Vec<PathBuf>,
    /// Pads whose padded pass could not run, with the reason (e.g. a bias table made for a
    /// clamped window that the larger input no longer clamps).
    pub skipped: Vec<(usize, String)>,
}

/// Refuse pads that are not a usable list: empty, repeated, or so large the input exceeds
/// the largest side Mullion accepts.
pub fn check_pads(pads: &[usize]) -> Result<()> {
    if pads.is_empty() {
        return Err(Error::BadArgument(
            "--pads: give at least one padding".into(),
        ));
    }
    for (i, p) in pads.iter().enumerate() {
        if *p > MAX_PAD_PX {
            return Err(Error::BadArgument(format!(
                "--pads: {p} pixels is more than the {MAX_PAD_PX} allowed"
            )));
        }
        if pads[..i].contains(p) {
            return Err(Error::BadArgument(format!("--pads: {p} is given twice")));
        }
    }
    Ok(())
}

/// A number for the CSV files: plain decimals, exponent form for very small or large values
/// (the shortest form that reads back to the same f64 either way).
fn csv_f64(v: f64) -> String {
    if !v.is_finite() {
        "inf".into()
    } else if v == 0.0 || (1e-4..1e15).contains(&v.abs()) {
        format!("{v}")
    } else {
        format!("{v:e}")
    }
}

/// `sweep.csv` text.
pub fn sweep_csv(rows: &[SweepRow]) -> String {
    let mut t = String::from("pad_px,stage,mean_cosine,min_cosine,tokens\n");
    for r in rows {
        let _ = writeln!(
            t,
            "{},{},{},{},{}",
            r.pad_px,
            r.stage,
            r.mean_cosine.map_or(String::new(), csv_f64),
            r.min_cosine.map_or(String::new(), csv_f64),
            r.tokens
        );
    }
    t
}

/// `orders.csv` text.
pub fn orders_csv(rows: &[OrderRow]) -> String {
    let mut t = String::from("stage,max_rel_diff,share_over_1e-3\n");
    for r in rows {
        let _ = writeln!(
            t,
            "{},{},{}",
            r.stage,
            csv_f64(r.max_rel_diff),
            csv_f64(r.share_over)
        );
    }
    t
}

/// `pad_attention.csv` text.
pub fn pad_attention_csv(rows: &[PadShareStats]) -> String {
    let mut t = String::from("stage,block,mean_share,max_share\n");
    for r in rows {
        let _ = writeln!(
            t,
            "{},{},{},{}",
            r.stage,
            r.block,
            csv_f64(r.mean_share),
            csv_f64(r.max_share)
        );
    }
    t
}

/// The profile rows of one map (every stage): window positions for the stage's first regular
/// and first shifted block, then the border profile.
fn profile_rows(t: &mut String, id: &str, maps: &[Map], out: &StageOutputs) -> Result<()> {
    for (s, map) in maps.iter().enumerate() {
        let Some(values) = map.scalars() else {
            continue;
        };
        let sg = &out.geometry.stages[s];
        let regular = sg.blocks.iter().find(|b| !b.is_shifted());
        let shifted = sg.blocks.iter().find(|b| b.is_shifted());
        for (name, block) in [("window-regular", regular), ("window-shifted", shifted)] {
            let Some(block) = block else { continue };
            for bin in window_profile(values, block)? {
                let _ = writeln!(
                    t,
                    "{id},{s},{name},{},{},,{},{}",
                    bin.at.0,
                    bin.at.1,
                    csv_f64(bin.mean),
                    bin.tokens
                );
            }
        }
        let (rows, cols) = map.dims();
        for bin in border_profile(values, rows, cols)? {
            let _ = writeln!(
                t,
                "{id},{s},border,,,{},{},{}",
                bin.at.0,
                csv_f64(bin.mean),
                bin.tokens
            );
        }
    }
    Ok(())
}

/// The figures of one study, made as maps are ready.
struct Figures<'a> {
    dir: Option<PathBuf>,
    image_path: &'a Path,
    image: Option<image::RgbImage>,
    checkpoint: String,
    written: Vec<PathBuf>,
}

impl Figures<'_> {
    fn add(
        &mut self,
        base: &StageOutputs,
        second: &StageOutputs,
        kind: &dyn MapKind,
        note: String,
    ) -> Result<()> {
        let Some(dir) = &self.dir else {
            return Ok(());
        };
        if self.image.is_none() {
            self.image = Some(load_image(self.image_path)?);
        }
        let image = self.image.as_ref().expect("loaded above");
        let spec = ScaleSpec::default();
        let colormap = Colormap::Viridis;
        let scale = render::default_figure_scale(image.height());
        let (_, stages) = prepare_stage_pair(base, Some(second), kind, &spec)?;
        let fig = render::compose_figure(&FigureSpec {
            image,
            geometry: &base.geometry,
            stages: &stages,
            style: render::figure_panel_style(colormap, 0.6, Overlays::default(), scale),
            checkpoint: self.checkpoint.clone(),
            map_label: kind.label(),
            notes: vec![
                render::scale_note(&spec, colormap),
                note,
                PADDING_CAUTION.to_string(),
            ],
            text_px: render::figure_text_px(scale),
        })?;
        let path = dir.join(crate::io::figure_file_name(self.image_path, &kind.id()));
        crate::io::save_png_atomic(&fig, &path)?;
        self.written.push(path);
        Ok(())
    }
}

/// Run the study and write its files. Arguments are checked before the checkpoint is opened.
pub fn run_padding(opts: &PaddingOptions) -> Result<PaddingOutcome> {
    check_pads(&opts.pads)?;
    let names = [
        SWEEP_NAME,
        ORDERS_NAME,
        PAD_ATTENTION_NAME,
        PROFILE_NAME,
        SIZES_NAME,
    ];
    let paths: Vec<PathBuf> = names.iter().map(|n| opts.out.join(n)).collect();
    let inputs = opts.session.run_inputs(&opts.image);
    let outputs: Vec<(&str, &Path)> = paths.iter().map(|p| ("--out", p.as_path())).collect();
    crate::io::check_outputs(&inputs, &outputs)?;
    let _lock = crate::io::lock_folder(&opts.out)?;
    let figures_dir = opts.figures.then(|| opts.out.join(FIGURES_DIR));
    if let Some(d) = &figures_dir {
        std::fs::create_dir_all(d).map_err(|e| Error::io(d, e))?;
    }
    let session = Session::open(&opts.session)?;
    let x = session.load_input(&opts.image)?;
    // The image's own pass keeps every block's attention (the attention study needs them all):
    // count them on top of the pass itself before running it.
    let (_, h, w) = x.dims3()?;
    let model = &session.model;
    let taps = all_attention_bytes(
        &model.geometry((h, w), Some(session.semantics)),
        &model.config.heads,
    );
    let need = model
        .estimate_bytes((h, w), Some(session.semantics))
        .zip(taps)
        .and_then(|(a, b)| a.checked_add(b));
    check_budget(need, (h, w), session.memory_limit).map_err(|e| match e {
        Error::Limit(m) => Error::Limit(format!(
            "{}: {m} (the padding study keeps every block's attention weights)",
            opts.image.display()
        )),
        other => other,
    })?;
    let base = session.forward_input(
        &opts.image,
        &x,
        &ForwardOptions {
            attention_all: true,
            ..ForwardOptions::default()
        },
    )?;
    let n = base.stages.len();
    let mut figs = Figures {
        dir: figures_dir,
        image_path: &opts.image,
        image: None,
        checkpoint: session.checkpoint_name(),
        written: Vec::new(),
    };
    let mut profile = String::from("map,stage,profile,row,col,distance,mean,tokens\n");

    // The sweep: one padded pass per pad, compared over the unpadded grid.
    let mut sweep = Vec::new();
    let mut skipped = Vec::new();
    let mut largest_maps: Option<(String, Vec<Map>)> = None;
    let mut largest_done = None;
    for &p in &opts.pads {
        let padded = if p == 0 {
            None
        } else {
            // A pad the checkpoint cannot run (a clamped window's bias table, the memory
            // limit) leaves its rows empty; the other pads and studies still run.
            match session.forward_input(
                &opts.image,
                &pad_input(&x, p, p)?,
                &ForwardOptions::default(),
            ) {
                Ok(out) => Some(out),
                Err(Error::Cancelled) => return Err(Error::Cancelled),
                Err(e) => {
                    eprintln!("pad {p} px: not computed: {e}");
                    skipped.push((p, e.to_string()));
                    for s in 0..n {
                        sweep.push(SweepRow {
                            pad_px: p,
                            stage: s,
                            mean_cosine: None,
                            min_cosine: None,
                            tokens: base.geometry.stages[s].grid.0 * base.geometry.stages[s].grid.1,
                        });
                    }
                    continue;
                }
            }
        };
        let other = padded.as_ref().unwrap_or(&base);
        for s in 0..n {
            let (_, cos) = sweep_cosines(&base, other, s)?;
            sweep.push(SweepRow {
                pad_px: p,
                stage: s,
                mean_cosine: Some(cos.iter().sum::<f64>() / cos.len().max(1) as f64),
                min_cosine: Some(cos.iter().copied().fold(f64::INFINITY, f64::min)),
                tokens: cos.len(),
            });
        }
        if padded.is_some() && largest_done.is_none_or(|l| p > l) {
            largest_done = Some(p);
        }
        if let Some(padded) = &padded {
            let kind = PaddingSensitivity::new(p)?;
            if largest_done == Some(p) {
                largest_maps = Some((
                    kind.id(),
                    (0..n)
                        .map(|s| kind.compute_pair(&base, Some(padded), s))
                        .collect::<Result<Vec<Map>>>()?,
                ));
            }
            figs.add(
                &base,
                padded,
                &kind,
                format!("{p} zero rows (bottom) and columns (right) added after normalisation"),
            )?;
        }
    }

    if let Some((id, maps)) = &largest_maps {
        profile_rows(&mut profile, id, maps, &base)?;
    }

    // The two pad orders, the small-stage rule kept.
    let other = session.forward_input(
        &opts.image,
        &x,
        &variant_options(Variant::OtherPadOrder, base.geometry.semantics),
    )?;
    let (f1, f2) = ordered(&base, &other)?;
    let mut orders = Vec::new();
    for s in 0..n {
        let st = order_disagreement(&stage_tokens(f1, s)?, &stage_tokens(f2, s)?)?;
        orders.push(OrderRow {
            stage: s,
            max_rel_diff: st.max_rel_diff,
            share_over: st.share_over,
        });
    }
    let maps: Vec<Map> = (0..n)
        .map(|s| OrderDisagreement.compute_pair(&base, Some(&other), s))
        .collect::<Result<_>>()?;
    profile_rows(&mut profile, &OrderDisagreement.id(), &maps, &base)?;
    figs.add(
        &base,
        &other,
        &OrderDisagreement,
        format!(
            "small stages '{}' in both passes",
            base.geometry.semantics.small_stage.name()
        ),
    )?;
    drop(other);

    // Attention on padding keys, every block; maps of the blocks every stage has (at most 2).
    let attention = pad_attention_stats(&base)?;
    let common = session
        .model
        .config
        .depths
        .iter()
        .copied()
        .min()
        .unwrap_or(0);
    for b in 0..common.min(2) {
        let kind = AttentionOnPadding(b);
        let maps: Vec<Map> = (0..n)
            .map(|s| kind.compute(&base, s))
            .collect::<Result<_>>()?;
        profile_rows(&mut profile, &kind.id(), &maps, &base)?;
        figs.add(&base, &base, &kind, "mean over heads".into())?;
    }

    let (h, w) = base.geometry.image;
    let advice = size_advice(
        (h, w),
        &session.model.config.shape(),
        base.geometry.semantics,
        MAX_SIDE as usize,
    );
    let sizes = format!(
        "{}(semantics {} with small stages '{}')\n{PADDING_CAUTION}\n",
        advice.text(),
        base.geometry.semantics.pad_order.name(),
        base.geometry.semantics.small_stage.name()
    );

    write_text_atomic(&paths[0], &sweep_csv(&sweep))?;
    write_text_atomic(&paths[1], &orders_csv(&orders))?;
    write_text_atomic(&paths[2], &pad_attention_csv(&attention))?;
    write_text_atomic(&paths[3], &profile)?;
    write_text_atomic(&paths[4], &sizes)?;
    let mut files = paths;
    files.extend(figs.written);
    Ok(PaddingOutcome {
        sweep,
        orders,
        attention,
        files,
        skipped,
    })
}
