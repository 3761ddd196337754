//! The bundled demo: generated images are reproducible, the demo checkpoint loads through the
//! normal loader, and it responds to the scene — its last stage's token norm is higher on plants
//! than elsewhere on the sample images (AUROC > 0.7, Mann-Whitney with ties one half, computed
//! with the project's own statistics) — and more so than the early checkpoint.

use crate::common::sample;
use mullion::demo::tray::{class_at, generate, sample_set, CellClass};
use mullion::engine::input::{load_image, normalise, Normalisation};
use mullion::engine::{
    Backbone, Checkpoint, ConfigOverride, ForwardOptions, LoadReport, RunControl,
};
use mullion::numeric::auroc;

fn load(name: &str) -> (Checkpoint, Backbone) {
    let ckpt = Checkpoint::open(sample(name)).unwrap();
    let model = Backbone::from_checkpoint(&ckpt, &ConfigOverride::default()).unwrap();
    (ckpt, model)
}

#[test]
fn the_bundled_images_are_what_the_generator_makes() {
    for spec in sample_set() {
        let file = sample(&format!("{}.png", spec.name));
        let on_disk = load_image(&file).unwrap();
        let made = generate(&spec).image;
        assert_eq!(
            on_disk.dimensions(),
            (spec.width, spec.height),
            "{}",
            spec.name
        );
        assert!(
            on_disk.as_raw() == made.as_raw(),
            "{} differs from a fresh generation",
            spec.name
        );
    }
}

#[test]
fn the_demo_checkpoints_load_with_their_shape() {
    for name in ["demo.safetensors", "demo-early.safetensors"] {
        let (ckpt, model) = load(name);
        let report = LoadReport::new(&ckpt, &model);
        assert_eq!(model.config.embed_dim, 32, "{name}");
        assert_eq!(model.config.depths, vec![2, 2, 4, 2], "{name}");
        assert_eq!(model.config.heads, vec![1, 2, 4, 8], "{name}");
        assert!(
            report.ignored.iter().any(|(n, _)| n == "head.cells.weight"),
            "{name}: head listed as ignored"
        );
        let text = report.to_string();
        assert!(text.contains("timm >= 0.9"), "{text}");
    }
}

/// AUROC of the last-stage token norm, plant tokens against the others, over all sample images.
fn plant_auroc(model: &Backbone) -> f64 {
    let (mut plant, mut other) = (Vec::new(), Vec::new());
    for spec in sample_set() {
        let scene = generate(&spec);
        let x = normalise(&scene.image, &Normalisation::IMAGENET).unwrap();
        let out = model
            .forward(&x, &ForwardOptions::default(), &RunControl::default())
            .unwrap();
        let stage = out.geometry.stages.last().unwrap();
        let t = out.stages.last().unwrap();
        let norms: Vec<f32> = t
            .sqr()
            .unwrap()
            .sum(2)
            .unwrap()
            .sqrt()
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        let s = stage.stride;
        for (i, n) in norms.iter().enumerate() {
            let (r, c) = (i / stage.grid.1, i % stage.grid.1);
            let (x, y) = ((c * s + s / 2) as u32, (r * s + s / 2) as u32);
            if x >= spec.width || y >= spec.height {
                continue;
            }
            match class_at(&scene, x, y) {
                Some(CellClass::Healthy | CellClass::Wilted | CellClass::Weed) => {
                    plant.push(*n as f64)
                }
                _ => other.push(*n as f64),
            }
        }
    }
    assert!(
        plant.len() > 30 && other.len() > 30,
        "{} plant, {} other tokens",
        plant.len(),
        other.len()
    );
    auroc(&plant, &other).unwrap()
}

#[test]
fn the_demo_checkpoint_responds_to_plants_more_than_the_early_one() {
    let (_, final_model) = load("demo.safetensors");
    let (_, early_model) = load("demo-early.safetensors");
    let final_auroc = plant_auroc(&final_model);
    let early_auroc = plant_auroc(&early_model);
    eprintln!(
        "last-stage norm AUROC plant vs other: final {final_auroc:.3}, early {early_auroc:.3}"
    );
    assert!(final_auroc > 0.7, "final {final_auroc:.3}");
    assert!(
        final_auroc > early_auroc,
        "final {final_auroc:.3} vs early {early_auroc:.3}"
    );
}

#[test]
fn the_sample_regions_load_for_the_demo_images() {
    for spec in sample_set() {
        let sidecar = sample(&format!("{}.png.regions.json", spec.name));
        let sc = mullion::annotation::load(&sidecar)
            .unwrap()
            .expect("a sidecar per sample image");
        assert_eq!((sc.width, sc.height), (spec.width, spec.height));
    }
}
