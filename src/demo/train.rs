//! Training the demo checkpoint: a small shifted-window backbone learns, from generated
//! seedling-tray images, which class each last-stage token's centre falls on (soil or tray,
//! empty cell, healthy seedling, wilted seedling, weed).
//!
//! It runs the engine's own layers with candle's autograd (the layers switch to their
//! differentiable forms when weights are variables), so the checkpoint is made by the same code
//! that later inspects it. Never run in CI; `mullion train-demo` reproduces the bundled files.

use crate::demo::tray::{class_at, generate, CellClass, Scene, SceneSpec};
use crate::engine::input::{normalise, Normalisation};
use crate::engine::layers::WeightSource;
use crate::engine::{Backbone, Config, ForwardOptions, Part, RunControl};
use crate::error::{Error, Result};
use candle_core::{DType, Device, Tensor, Var, D};
use candle_nn::optim::{AdamW, Optimizer, ParamsAdamW};
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal};
use std::cell::RefCell;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Token classes, in logit order.
pub const CLASSES: [&str; 5] = ["soil", "empty", "healthy", "wilted", "weed"];

fn class_index(c: Option<CellClass>) -> u32 {
    match c {
        None => 0,
        Some(CellClass::Empty) => 1,
        Some(CellClass::Healthy) => 2,
        Some(CellClass::Wilted) => 3,
        Some(CellClass::Weed) => 4,
    }
}

/// The demo model's shape: a few million parameters at most.
pub fn demo_config() -> Config {
    Config {
        in_chans: 3,
        patch: 4,
        embed_dim: 32,
        depths: vec![2, 2, 4, 2],
        heads: vec![1, 2, 4, 8],
        window: (7, 7),
        mlp_ratio: 4.0,
        v2: None,
    }
}

/// How to train.
#[derive(Clone, Debug)]
pub struct TrainSpec {
    pub config: Config,
    pub steps: usize,
    pub batch: usize,
    /// Image sides are drawn from this range (both axes, independently): odd sizes included.
    pub sides: (u32, u32),
    pub lr: f64,
    pub seed: u64,
    /// Also save the weights after this many steps (the "before fine-tuning" checkpoint).
    pub early_step: Option<usize>,
    /// Stop early after this many seconds.
    pub max_seconds: Option<f64>,
}

impl Default for TrainSpec {
    fn default() -> Self {
        TrainSpec {
            config: demo_config(),
            steps: 600,
            batch: 4,
            sides: (160, 256),
            lr: 6e-4,
            seed: 20261201,
            early_step: Some(15),
            max_seconds: None,
        }
    }
}

/// Trainable weights under their canonical (timm) names.
struct Trainable {
    rng: RefCell<rand::rngs::StdRng>,
    window: (usize, usize),
    vars: RefCell<BTreeMap<String, Var>>,
}

impl Trainable {
    fn var(
        &self,
        name: String,
        shape: &[usize],
        init: impl FnOnce(usize, &mut rand::rngs::StdRng) -> Vec<f32>,
    ) -> Result<Tensor> {
        let n: usize = shape.iter().product();
        let data = init(n, &mut self.rng.borrow_mut());
        let var = Var::from_tensor(&Tensor::from_vec(data, shape, &Device::Cpu)?)?;
        let t = var.as_tensor().clone();
        self.vars.borrow_mut().insert(name, var);
        Ok(t)
    }
}

fn normal(n: usize, std: f64, rng: &mut rand::rngs::StdRng) -> Vec<f32> {
    let d = Normal::new(0.0, std).expect("finite std");
    (0..n).map(|_| d.sample(rng) as f32).collect()
}

impl WeightSource for Trainable {
    fn get(&self, part: Part, shape: &[usize]) -> Result<Tensor> {
        let name = part.canonical();
        let is_norm = name.contains("norm") && shape.len() == 1;
        let shape_owned = shape.to_vec();
        self.var(name.clone(), shape, move |n, rng| {
            if is_norm {
                vec![if name.ends_with("weight") { 1.0 } else { 0.0 }; n]
            } else if shape_owned.len() == 1 {
                vec![0.0; n]
            } else {
                let fan_in: usize = shape_owned[1..].iter().product();
                normal(n, (1.0 / fan_in as f64).sqrt(), rng)
            }
        })
    }
    fn bias_table(&self, part: Part, heads: usize) -> Result<Tensor> {
        let rows = (2 * self.window.0 - 1) * (2 * self.window.1 - 1);
        self.var(part.canonical(), &[rows, heads], |n, rng| {
            normal(n, 0.02, rng)
        })
    }
}

/// One training example: the normalised image and, per last-stage token, its class (or
/// `u32::MAX` for a token whose centre lies in padding, which is not scored).
pub struct Example {
    pub image: Tensor,
    pub labels: Vec<u32>,
    /// The same for the stage before the last (the auxiliary head).
    pub aux_labels: Option<Vec<u32>>,
    pub scene: Scene,
}

/// Cross-entropy over the tokens whose label is not `u32::MAX`; `None` when there are none.
fn scored_cross_entropy(logits: &Tensor, labels: &[u32]) -> Result<Option<Tensor>> {
    let keep: Vec<u32> = (0..labels.len() as u32)
        .filter(|&i| labels[i as usize] != u32::MAX)
        .collect();
    if keep.is_empty() {
        return Ok(None);
    }
    let target: Vec<u32> = keep.iter().map(|&i| labels[i as usize]).collect();
    let idx = Tensor::from_vec(keep, target.len(), &Device::Cpu)?;
    let target = Tensor::from_vec(target.clone(), target.len(), &Device::Cpu)?;
    Ok(Some(candle_nn::loss::cross_entropy(
        &logits.index_select(&idx, 0)?,
        &target,
    )?))
}

/// Binary cross-entropy of plant presence (healthy, wilted, weed) from presence logits, over
/// the scored tokens.
fn presence_loss(logits: &Tensor, labels: &[u32]) -> Result<Tensor> {
    let keep: Vec<u32> = (0..labels.len() as u32)
        .filter(|&i| labels[i as usize] != u32::MAX)
        .collect();
    let target: Vec<f32> = keep
        .iter()
        .map(|&i| {
            if (2..=4).contains(&labels[i as usize]) {
                1.0
            } else {
                0.0
            }
        })
        .collect();
    let idx = Tensor::from_vec(keep, target.len(), &Device::Cpu)?;
    let target = Tensor::from_vec(target.clone(), target.len(), &Device::Cpu)?;
    Ok(candle_nn::loss::binary_cross_entropy_with_logit(
        &logits.index_select(&idx, 0)?,
        &target,
    )?)
}

/// Labels of the last-stage tokens of a scene: the class under each token's centre pixel.
pub fn token_labels(scene: &Scene, grid: (usize, usize), stride: usize) -> Vec<u32> {
    let (w, h) = scene.image.dimensions();
    let mut out = Vec::with_capacity(grid.0 * grid.1);
    for r in 0..grid.0 {
        for c in 0..grid.1 {
            let (x, y) = (c * stride + stride / 2, r * stride + stride / 2);
            out.push(if x < w as usize && y < h as usize {
                class_index(class_at(scene, x as u32, y as u32))
            } else {
                u32::MAX
            });
        }
    }
    out
}

pub fn example(spec: &SceneSpec, model: &Backbone) -> Result<Example> {
    let scene = generate(spec);
    let image = normalise(&scene.image, &Normalisation::IMAGENET)?;
    let g = model.geometry((spec.height as usize, spec.width as usize), None);
    let last = g.stages.last().expect("a stage");
    let labels = token_labels(&scene, last.grid, last.stride);
    let aux_labels = (g.stages.len() >= 2).then(|| {
        let s = &g.stages[g.stages.len() - 2];
        token_labels(&scene, s.grid, s.stride)
    });
    Ok(Example {
        image,
        labels,
        aux_labels,
        scene,
    })
}

/// The trainable model: backbone plus a per-token linear head on the last stage.
pub struct DemoModel {
    pub backbone: Backbone,
    head_w: Tensor,
    head_b: Tensor,
    /// A second head on the stage before the last (twice the resolution): denser labels help
    /// the early stages learn the plants; only used while training.
    aux: Option<(Tensor, Tensor)>,
    /// Scale and shift of a logistic read of the log L2 norm of each raw last-stage token (training
    /// only): it ties the norm, the window's default view, to plant presence.
    norm_probe: Option<(Tensor, Tensor)>,
    vars: BTreeMap<String, Var>,
}

impl DemoModel {
    pub fn new(config: Config, seed: u64) -> Result<Self> {
        let src = Trainable {
            rng: RefCell::new(rand::rngs::StdRng::seed_from_u64(seed)),
            window: config.window,
            vars: RefCell::new(BTreeMap::new()),
        };
        // The final norm is part of what the head reads, as in the usual classification setup.
        let backbone = Backbone::build(config.clone(), &src, false, true)?;
        let c = config.dim(config.n_stages() - 1);
        let k = CLASSES.len();
        let head_w = src.var("head.cells.weight".into(), &[k, c], |n, rng| {
            normal(n, (1.0 / c as f64).sqrt(), rng)
        })?;
        let head_b = src.var("head.cells.bias".into(), &[k], |n, _| vec![0.0; n])?;
        let aux = if config.n_stages() >= 2 {
            let c2 = config.dim(config.n_stages() - 2);
            let std = (1.0 / c2 as f64).sqrt();
            let w = src.var("aux.cells.weight".into(), &[k, c2], |n, rng| {
                normal(n, std, rng)
            })?;
            let b = src.var("aux.cells.bias".into(), &[k], |n, _| vec![0.0; n])?;
            Some((w, b))
        } else {
            None
        };
        let norm_probe = Some((
            src.var("aux.norm.scale".into(), &[1], |n, _| vec![1.0; n])?,
            src.var("aux.norm.shift".into(), &[1], |n, _| vec![3.0; n])?,
        ));
        Ok(DemoModel {
            backbone,
            head_w,
            head_b,
            aux,
            norm_probe,
            vars: src.vars.into_inner(),
        })
    }

    /// Logits `[tokens, classes]` of the last stage.
    pub fn logits(&self, image: &Tensor) -> Result<Tensor> {
        Ok(self.all_logits(image)?.0 .0)
    }

    /// Last-stage logits and, while training, the auxiliary head's logits on the stage before
    /// (layer-normalised without affine weights, so the head reads the same scale as the main one).
    /// Also the presence logits read off the raw last-stage token norms.
    #[allow(clippy::type_complexity)]
    fn all_logits(&self, image: &Tensor) -> Result<((Tensor, Option<Tensor>), Option<Tensor>)> {
        let opts = ForwardOptions {
            final_norm: true,
            ..Default::default()
        };
        let out = self
            .backbone
            .forward(image, &opts, &RunControl::default())?;
        let last = out
            .final_norm
            .as_ref()
            .ok_or_else(|| Error::Internal("the demo model has no final norm".into()))?;
        let (h, w, c) = last.dims3()?;
        let x = last.reshape((h * w, c))?;
        let main = x.matmul(&self.head_w.t()?)?.broadcast_add(&self.head_b)?;
        let aux = match (&self.aux, out.stages.len() >= 2) {
            (Some((aw, ab)), true) => {
                let s = &out.stages[out.stages.len() - 2];
                let (h2, w2, c2) = s.dims3()?;
                let t = s.reshape((h2 * w2, c2))?;
                let mean = t.mean_keepdim(1)?;
                let centred = t.broadcast_sub(&mean)?;
                let var = centred.sqr()?.mean_keepdim(1)?;
                let normed = centred.broadcast_div(&(var + 1e-5)?.sqrt()?)?;
                Some(normed.matmul(&aw.t()?)?.broadcast_add(ab)?)
            }
            _ => None,
        };
        let presence = match &self.norm_probe {
            Some((scale, shift)) => {
                let raw = out.stages.last().expect("a stage");
                let (h, w, c) = raw.dims3()?;
                let log_norm = (raw.reshape((h * w, c))?.sqr()?.sum(1)? + 1e-6)?
                    .sqrt()?
                    .log()?;
                Some(log_norm.broadcast_sub(shift)?.broadcast_mul(scale)?)
            }
            None => None,
        };
        Ok(((main, aux), presence))
    }

    /// Mean cross-entropy over the scored tokens of a batch (plus half the auxiliary head's).
    pub fn loss(&self, batch: &[Example]) -> Result<Tensor> {
        let mut total: Option<Tensor> = None;
        for ex in batch {
            let ((main, aux), presence) = self.all_logits(&ex.image)?;
            let mut l = scored_cross_entropy(&main, &ex.labels)?;
            if let (Some(p), Some(m)) = (presence, l.clone()) {
                l = Some((m + (presence_loss(&p, &ex.labels)? * 0.5)?)?);
            }
            if let (Some(aux), Some(labels)) = (aux, &ex.aux_labels) {
                if let Some(a) = scored_cross_entropy(&aux, labels)? {
                    l = Some(match l {
                        Some(m) => (m + (a * 0.5)?)?,
                        None => (a * 0.5)?,
                    });
                }
            }
            if let Some(l) = l {
                total = Some(match total {
                    None => l,
                    Some(t) => (t + l)?,
                });
            }
        }
        let total =
            total.ok_or_else(|| Error::BadArgument("a batch without scored tokens".into()))?;
        Ok((total / batch.len() as f64)?)
    }

    /// Token accuracy per class and overall on examples (argmax of the logits).
    pub fn accuracy(&self, examples: &[Example]) -> Result<(f64, Vec<(usize, usize)>)> {
        let mut per = vec![(0usize, 0usize); CLASSES.len()];
        for ex in examples {
            let logits = self.logits(&ex.image)?;
            let pred: Vec<u32> = logits.argmax(D::Minus1)?.to_vec1()?;
            for (p, &l) in pred.iter().zip(&ex.labels) {
                if l != u32::MAX {
                    per[l as usize].1 += 1;
                    if *p == l {
                        per[l as usize].0 += 1;
                    }
                }
            }
        }
        let (right, all) = per.iter().fold((0, 0), |a, b| (a.0 + b.0, a.1 + b.1));
        Ok((right as f64 / all.max(1) as f64, per))
    }

    pub fn vars(&self) -> Vec<Var> {
        self.vars.values().cloned().collect()
    }

    /// Save as a safetensors checkpoint in timm's key layout (the head as `head.cells.*`).
    pub fn save(&self, path: &Path) -> Result<()> {
        // The auxiliary head only helped training; the checkpoint carries the main head.
        let map: std::collections::HashMap<String, Tensor> = self
            .vars
            .iter()
            .filter(|(k, _)| !k.starts_with("aux."))
            .map(|(k, v)| (k.clone(), v.as_tensor().detach()))
            .collect();
        crate::io::save_tensors(&map, path)
    }
}

/// Random training scenes: sizes drawn from `sides`, seeds from the training seed.
pub fn training_spec(rng: &mut rand::rngs::StdRng, sides: (u32, u32)) -> SceneSpec {
    let w = rng.gen_range(sides.0..=sides.1);
    let h = rng.gen_range(sides.0..=sides.1);
    // Keep away from the bundled sample seeds (small constants) and the held-out ones.
    SceneSpec::new("train", w, h, rng.gen_range(1_000_000..u32::MAX as u64))
}

/// Held-out scenes, never trained on.
pub fn held_out_specs(n: usize) -> Vec<SceneSpec> {
    let sizes = [(224, 224), (333, 250), (250, 333), (300, 200), (257, 191)];
    (0..n)
        .map(|i| {
            let (w, h) = sizes[i % sizes.len()];
            SceneSpec::new(format!("held-out-{i}"), w, h, 900_000 + i as u64)
        })
        .collect()
}

/// What a run did, for the model card.
#[derive(Debug, Clone, serde::Serialize)]
pub struct TrainLog {
    pub steps: usize,
    pub seconds: f64,
    pub losses: Vec<(usize, f32)>,
    pub early: Option<PathBuf>,
    pub last: Option<PathBuf>,
}

/// Train; save `early_step` and final weights into `out_dir` as `demo-early.safetensors` and
/// `demo.safetensors`. `on_step(step, loss)` reports progress.
pub fn train(
    spec: &TrainSpec,
    out_dir: Option<&Path>,
    mut on_step: impl FnMut(usize, f32),
) -> Result<(DemoModel, TrainLog)> {
    let model = DemoModel::new(spec.config.clone(), spec.seed)?;
    let params = ParamsAdamW {
        lr: spec.lr,
        weight_decay: 0.01,
        ..Default::default()
    };
    let mut opt = AdamW::new(model.vars(), params)?;
    let mut rng = rand::rngs::StdRng::seed_from_u64(spec.seed ^ 0x5eed);
    let start = std::time::Instant::now();
    let mut log = TrainLog {
        steps: 0,
        seconds: 0.0,
        losses: Vec::new(),
        early: None,
        last: None,
    };
    for step in 0..spec.steps {
        if let Some(limit) = spec.max_seconds {
            if start.elapsed().as_secs_f64() > limit {
                break;
            }
        }
        // Linear warm-up over the first 40 steps, then cosine decay to a tenth of the rate.
        let t = step as f64 / spec.steps.max(1) as f64;
        let warm = ((step + 1) as f64 / 40.0).min(1.0);
        let cosine = 0.1 + 0.9 * 0.5 * (1.0 + (std::f64::consts::PI * t).cos());
        opt.set_learning_rate(warm * spec.lr * cosine);
        let batch: Vec<Example> = (0..spec.batch)
            .map(|_| example(&training_spec(&mut rng, spec.sides), &model.backbone))
            .collect::<Result<_>>()?;
        let loss = model.loss(&batch)?;
        opt.backward_step(&loss)?;
        let l = loss.to_dtype(DType::F32)?.to_scalar::<f32>()?;
        on_step(step, l);
        log.losses.push((step, l));
        log.steps = step + 1;
        if spec.early_step == Some(step + 1) {
            if let Some(dir) = out_dir {
                let p = dir.join("demo-early.safetensors");
                model.save(&p)?;
                log.early = Some(p);
            }
        }
    }
    log.seconds = start.elapsed().as_secs_f64();
    if let Some(dir) = out_dir {
        let p = dir.join("demo.safetensors");
        model.save(&p)?;
        log.last = Some(p);
    }
    Ok((model, log))
}

impl DemoModel {
    /// Load a saved demo checkpoint (backbone and the `head.cells` head).
    pub fn load(path: &Path) -> Result<Self> {
        let backbone = crate::engine::open_checkpoint(path, None)?.model;
        let all = candle_core::safetensors::load(path, &Device::Cpu)
            .map_err(|e| Error::bad_file(path, format!("cannot read: {e}")))?;
        let get = |k: &str| {
            all.get(k)
                .cloned()
                .ok_or_else(|| Error::bad_file(path, format!("no {k}: not a demo checkpoint")))
        };
        Ok(DemoModel {
            backbone,
            head_w: get("head.cells.weight")?,
            head_b: get("head.cells.bias")?,
            aux: None,
            norm_probe: None,
            vars: BTreeMap::new(),
        })
    }
}

/// Last-stage token L2 norms of an example, split by whether the token's centre is on a plant
/// (healthy, wilted or weed) or not (soil, empty cell, tray); padding tokens are left out.
pub fn plant_and_other_norms(backbone: &Backbone, ex: &Example) -> Result<(Vec<f64>, Vec<f64>)> {
    let out = backbone.forward(
        &ex.image,
        &ForwardOptions::default(),
        &RunControl::default(),
    )?;
    let last = out.stages.last().expect("a stage");
    let norms: Vec<f32> = last.sqr()?.sum(2)?.sqrt()?.flatten_all()?.to_vec1()?;
    let (mut plant, mut other) = (Vec::new(), Vec::new());
    for (n, &l) in norms.iter().zip(&ex.labels) {
        match l {
            2..=4 => plant.push(*n as f64),
            0 | 1 => other.push(*n as f64),
            _ => {}
        }
    }
    Ok((plant, other))
}

/// The model card: data, training, held-out accuracy and the norm AUROC, early vs final.
pub fn model_card(
    spec: &TrainSpec,
    model: &DemoModel,
    log: &TrainLog,
    dir: &Path,
) -> Result<String> {
    let held: Vec<Example> = held_out_specs(20)
        .iter()
        .map(|s| example(s, &model.backbone))
        .collect::<Result<_>>()?;
    let mut rows = Vec::new();
    let early = dir.join("demo-early.safetensors");
    let mut models: Vec<(&str, DemoModel)> = Vec::new();
    if early.exists() {
        models.push(("early (before fine-tuning)", DemoModel::load(&early)?));
    }
    let final_model = DemoModel::load(&dir.join("demo.safetensors"))?;
    models.push(("final", final_model));
    for (name, m) in &models {
        let (acc, per) = m.accuracy(&held)?;
        let (mut plant, mut other) = (Vec::new(), Vec::new());
        for ex in &held {
            let (p, o) = plant_and_other_norms(&m.backbone, ex)?;
            plant.extend(p);
            other.extend(o);
        }
        let au = crate::numeric::auroc(&plant, &other).unwrap_or(f64::NAN);
        let per: Vec<String> = per
            .iter()
            .zip(CLASSES)
            .map(|((r, n), c)| format!("{c} {:.0}% of {n}", 100.0 * *r as f64 / (*n).max(1) as f64))
            .collect();
        rows.push(format!(
            "| {name} | {:.1}% | {} | {au:.3} |",
            100.0 * acc,
            per.join(", ")
        ));
    }
    let params = spec.config.parameter_count(true, Some(CLASSES.len()));
    let last_loss = log.losses.last().map_or(f32::NAN, |l| l.1);
    Ok(format!(
        "# Demo checkpoint: seedling-tray cells\n\n\
         **This is a demo, not a useful detector.** It was trained by Mullion itself on synthetic \
         images from Mullion's own generator so that the bundled demo shows a backbone whose stages \
         respond to something. It has never seen a real photo.\n\n\
         ## Files\n\n\
         - `demo.safetensors`: the final weights (timm >= 0.9 key layout, plus a `head.cells.*` head).\n\
         - `demo-early.safetensors`: the same run after {early} steps (\"before fine-tuning\"), for checkpoint comparison.\n\n\
         ## Model\n\n\
         Shifted-window backbone, patch {p}, embed dim {c}, depths {d:?}, heads {h:?}, window {w}x{w}, \
         MLP ratio {m}; a linear head on the last stage's tokens ({params} parameters in all).\n\n\
         Besides the class of every token, training asks one more thing: a logistic read of the \
         log L2 norm of each raw last-stage token must tell plants from the rest (weight 0.5 in \
         the loss). This ties the token norm, the window's default view, to the scene on purpose, \
         so the demo shows a stage that visibly responds to plants; a checkpoint trained only for \
         its task need not have this property.\n\n\
         ## Task and data\n\n\
         Each last-stage token (32x32 pixels) is classified by the class under its centre pixel: \
         soil or tray, empty cell, healthy seedling, wilted seedling, weed. Training images are \
         generated on the fly (random sizes {s0}..{s1} pixels per side, odd sizes included, fresh seeds \
         every step); none of the bundled sample images or held-out seeds are trained on.\n\n\
         ## Training\n\n\
         `cargo run --release -- train-demo --out sample-data` (defaults: {steps} steps of {batch} images, \
         AdamW, learning rate {lr} with cosine decay, weight decay 0.01, seed {seed}). This run: {done} steps \
         in {secs:.0} s on the CPU; final training loss {last_loss:.3}.\n\n\
         ## Held-out evaluation (20 generated images, seeds 900000-900019)\n\n\
         | weights | token accuracy | per class (share correct of tokens) | AUROC of last-stage token norm, plant vs elsewhere |\n\
         | --- | --- | --- | --- |\n\
         {rows}\n\n\
         The AUROC is the probability that a token on a plant (healthy, wilted or weed) has a larger \
         last-stage L2 norm than a token elsewhere (soil, empty cell, tray; Mann-Whitney, ties one half).\n\n\
         ## Caution\n\n\
         {caution}\n",
        caution = crate::caution::CAUTION,
        early = spec.early_step.unwrap_or(0),
        p = spec.config.patch,
        c = spec.config.embed_dim,
        d = spec.config.depths,
        h = spec.config.heads,
        w = spec.config.window.0,
        m = spec.config.mlp_ratio,
        s0 = spec.sides.0,
        s1 = spec.sides.1,
        steps = spec.steps,
        batch = spec.batch,
        lr = spec.lr,
        seed = spec.seed,
        done = log.steps,
        secs = log.seconds,
        rows = rows.join("\n"),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    // A smoke test of the training loop (common practice: a model must be able to fit one
    // fixed batch): on tiny images, a few steps lower the loss on that batch.
    #[test]
    fn a_few_steps_lower_the_loss_on_a_fixed_batch() {
        let config = Config {
            embed_dim: 16,
            depths: vec![2, 2],
            heads: vec![1, 2],
            ..demo_config()
        };
        let model = DemoModel::new(config, 1).unwrap();
        let batch: Vec<Example> = [(64, 64, 11), (72, 56, 12)]
            .iter()
            .map(|&(w, h, s)| example(&SceneSpec::new("t", w, h, s), &model.backbone).unwrap())
            .collect();
        let mut opt = AdamW::new(
            model.vars(),
            ParamsAdamW {
                lr: 3e-3,
                ..Default::default()
            },
        )
        .unwrap();
        let first = model.loss(&batch).unwrap().to_scalar::<f32>().unwrap();
        for _ in 0..8 {
            let l = model.loss(&batch).unwrap();
            opt.backward_step(&l).unwrap();
        }
        let last = model.loss(&batch).unwrap().to_scalar::<f32>().unwrap();
        assert!(last < 0.8 * first, "loss {first} -> {last}");
    }

    #[test]
    fn labels_follow_the_scene() {
        let scene = generate(&SceneSpec::new("t", 224, 224, 5));
        let labels = token_labels(&scene, (7, 7), 32);
        assert_eq!(labels.len(), 49);
        assert!(
            labels.contains(&2),
            "some token centre on a healthy seedling"
        );
        // A grid larger than the image marks the overhang as unscored.
        let labels = token_labels(&scene, (8, 8), 32);
        assert_eq!(labels.iter().filter(|&&l| l == u32::MAX).count(), 15);
    }
}
