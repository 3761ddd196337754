//! Regions: sidecar files, token coverage, AUROC and the `report` command.
//!
//! External references: tests/fixtures/regions/auroc.json holds scikit-learn's `roc_auc_score`
//! and tests/fixtures/regions/coverage.json shapely's intersection areas, both written by
//! tests/reference/make_region_refs.py with the library versions recorded inside.

use crate::common::sample_data;
use mullion::analysis::{parse_map_kind, Map};
use mullion::analysis::{region_stats, token_weights, CAUTION};
use mullion::annotation::{self, Shape, Sidecar};
use mullion::engine::geometry::{Geometry, ModelShape, PadOrder, Semantics, SmallStage};
use mullion::engine::{random_timm_state_dict, Config};
use mullion::engine::{Session, SessionOptions};
use mullion::headless::report::{self, ReportOptions};
use mullion::numeric::auroc;
use serde_json::Value;
use std::path::{Path, PathBuf};

fn fixture(name: &str) -> Value {
    let p = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/regions")
        .join(name);
    serde_json::from_str(&std::fs::read_to_string(&p).unwrap()).unwrap()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * b.abs().max(1.0)
}

// ---------------------------------------------------------------------------------------------
// AUROC

/// Mann–Whitney U by counting every (positive, negative) pair, ties one half.
fn pair_count_auc(pos: &[f64], neg: &[f64]) -> f64 {
    let mut u = 0.0;
    for &p in pos {
        for &n in neg {
            u += if p > n {
                1.0
            } else if p == n {
                0.5
            } else {
                0.0
            };
        }
    }
    u / (pos.len() * neg.len()) as f64
}

fn split(case: &Value) -> (Vec<f64>, Vec<f64>) {
    let scores = f64s(&case["scores"]);
    let labels: Vec<u64> = case["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_u64().unwrap())
        .collect();
    let pos = scores
        .iter()
        .zip(&labels)
        .filter(|p| *p.1 == 1)
        .map(|p| *p.0)
        .collect();
    let neg = scores
        .iter()
        .zip(&labels)
        .filter(|p| *p.1 == 0)
        .map(|p| *p.0)
        .collect();
    (pos, neg)
}

#[test]
fn auroc_matches_scikit_learn_roc_auc_score() {
    let f = fixture("auroc.json");
    assert!(f["versions"]["scikit-learn"].is_string());
    let cases = f["cases"].as_array().unwrap();
    assert!(cases.len() >= 10);
    for case in cases {
        let (pos, neg) = split(case);
        let expected = case["expected"].as_f64().unwrap();
        let got = auroc(&pos, &neg).unwrap();
        assert!(
            (got - expected).abs() < 1e-12,
            "{}: {got} vs scikit-learn {expected}",
            case["name"]
        );
        let pairs = pair_count_auc(&pos, &neg);
        assert!(
            (got - pairs).abs() < 1e-12,
            "{}: pair count {pairs}",
            case["name"]
        );
    }
}

#[test]
fn auroc_closed_form_on_a_hand_case() {
    // Positives {3, 5}, negatives {1, 2, 3}: the pairs 3>1, 3>2, 3=3, 5>1, 5>2, 5>3 give
    // U = 5 + 1/2, and n1 n0 = 6.
    assert_eq!(auroc(&[3.0, 5.0], &[1.0, 2.0, 3.0]), Some(5.5 / 6.0));
    assert_eq!(auroc(&[4.0], &[1.0, 2.0]), Some(1.0));
    assert_eq!(auroc(&[0.0], &[1.0, 2.0]), Some(0.0));
    assert_eq!(auroc(&[], &[1.0]), None);
    assert_eq!(auroc(&[1.0], &[]), None);
    assert_eq!(auroc(&[f64::NAN], &[1.0]), None);
}

// ---------------------------------------------------------------------------------------------
// Coverage

fn case_shape(case: &Value) -> Shape {
    match case["kind"].as_str().unwrap() {
        "polygon" => Shape::Polygon {
            points: case["points"]
                .as_array()
                .unwrap()
                .iter()
                .map(|p| {
                    let v = f64s(p);
                    [v[0], v[1]]
                })
                .collect(),
        },
        "box" => {
            let b = f64s(&case["box"]);
            Shape::Box {
                x0: b[0],
                y0: b[1],
                x1: b[2],
                y1: b[3],
            }
        }
        k => panic!("unknown kind {k}"),
    }
}

#[test]
fn coverage_matches_shapely_intersection_areas() {
    let f = fixture("coverage.json");
    assert!(f["versions"]["shapely"].is_string());
    let cases = f["cases"].as_array().unwrap();
    let mut self_touching = 0;
    for case in cases {
        let shape = case_shape(case);
        let rects = case["rects"].as_array().unwrap();
        let expected = f64s(&case["expected"]);
        for (r, &e) in rects.iter().zip(&expected) {
            let r = f64s(r);
            let got = shape.intersection_area([r[0], r[1], r[2], r[3]]);
            assert!(
                (got - e).abs() <= 1e-9 * e.abs().max(1e-3),
                "{} in {r:?}: {got} vs shapely {e}",
                case["name"]
            );
        }
        let area = case["area"].as_f64().unwrap();
        assert!(close(shape.area(), area, 1e-9), "{}: area", case["name"]);
        if !case["valid_in_shapely"].as_bool().unwrap() {
            self_touching += 1;
        }
    }
    assert!(self_touching >= 3, "the fixture covers self-touching rings");
}

#[test]
fn regions_partly_outside_the_image_are_clipped_with_a_warning() {
    let f = fixture("coverage.json");
    // rects[0] of every case is the 10x10 image.
    let mut sc = Sidecar::new("ten.png", 10, 10);
    let mut expected = Vec::new();
    for case in f["cases"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        if name == "off_image" || name == "box_off_image" {
            sc.add_region(case_shape(case), name, "");
            expected.push(f64s(&case["expected"])[0]);
        }
    }
    sc.add_region(
        Shape::Box {
            x0: 1.0,
            y0: 1.0,
            x1: 2.0,
            y1: 2.0,
        },
        "inside",
        "",
    );
    sc.add_region(
        Shape::Box {
            x0: 11.0,
            y0: 1.0,
            x1: 12.0,
            y1: 2.0,
        },
        "gone",
        "",
    );
    let warnings = annotation::validate(&mut sc);
    assert_eq!(warnings.len(), 3, "{warnings:?}");
    assert!(warnings.iter().filter(|w| w.contains("clipped")).count() == 2);
    assert!(warnings.iter().any(|w| w.contains("dropped")));
    assert_eq!(sc.regions.len(), 3);
    for (r, e) in sc.regions.iter().zip(&expected) {
        let b = r.shape.bounds().unwrap();
        assert!(b[0] >= 0.0 && b[1] >= 0.0 && b[2] <= 10.0 && b[3] <= 10.0);
        assert!(
            close(r.shape.area(), *e, 1e-9),
            "{}: {}",
            r.label,
            r.shape.area()
        );
    }
    // A clean sidecar gives no warning and stays as it is.
    let before = sc.clone();
    assert!(annotation::validate(&mut sc).is_empty());
    assert_eq!(sc, before);
}

#[test]
fn token_weights_conserve_the_covered_area() {
    // Σ_i w_i |footprint_i| must equal |shape ∩ image| for any shape, at every stage, on an
    // image whose sides are not multiples of any stride.
    let shape = ModelShape {
        patch: 4,
        depths: vec![2, 2, 2, 2],
        window: (7, 7),
        built_for: None,
    };
    let sem = Semantics {
        pad_order: PadOrder::PadThenShift,
        small_stage: SmallStage::Clamp,
    };
    let g = Geometry::new((97, 160), &shape, sem);
    let image_rect = [0.0, 0.0, 160.0, 97.0];
    let f = fixture("coverage.json");
    for case in f["cases"].as_array().unwrap() {
        // Scale the 10x10 fixture shapes up to span the image and beyond.
        let s = match case_shape(case) {
            Shape::Polygon { points } => Shape::Polygon {
                points: points
                    .iter()
                    .map(|p| [p[0] * 15.3 + 3.1, p[1] * 9.7 - 1.3])
                    .collect(),
            },
            Shape::Box { x0, y0, x1, y1 } => Shape::Box {
                x0: x0 * 15.3 + 3.1,
                y0: y0 * 9.7 - 1.3,
                x1: x1 * 15.3 + 3.1,
                y1: y1 * 9.7 - 1.3,
            },
        };
        let total = s.intersection_area(image_rect);
        for st in &g.stages {
            let w = token_weights(st, g.image, &s);
            let mut sum = 0.0;
            for r in 0..st.grid.0 {
                for c in 0..st.grid.1 {
                    let [y0, y1, x0, x1] = st.footprint(r, c, g.image);
                    let a = ((y1 - y0) * (x1 - x0)) as f64;
                    let wi = w[r * st.grid.1 + c];
                    assert!((0.0..=1.0).contains(&wi));
                    sum += wi * a;
                }
            }
            assert!(
                close(sum, total, 1e-9),
                "{} stage {}: {sum} vs {total}",
                case["name"],
                st.index
            );
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Sidecar files

fn sample_sidecar() -> Sidecar {
    let mut sc = Sidecar::new("tray.png", 64, 48);
    sc.add_region(
        Shape::Box {
            x0: 2.0,
            y0: 3.5,
            x1: 20.25,
            y1: 30.0,
        },
        "healthy",
        "first row",
    );
    sc.add_region(
        Shape::Polygon {
            points: vec![[30.0, 5.0], [60.0, 10.0], [50.5, 40.0], [33.0, 30.0]],
        },
        "weed",
        "",
    );
    sc.add_pin([10.0, 40.0], "check again next week");
    // Coordinates as a pointer gives them, with all 17 digits.
    sc.add_region(
        Shape::Polygon {
            points: vec![
                [1.0 / 3.0, 47.0 / 7.0],
                [std::f64::consts::PI * 10.0, 0.1 + 0.2],
                [63.999999999999986, 47.123456789012345],
            ],
        },
        "healthy",
        "",
    );
    sc
}

fn unreadable_copies(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_string_lossy().contains(".unreadable"))
        .collect();
    v.sort();
    v
}

#[test]
fn sidecar_round_trip() {
    let dir = tempfile::tempdir().unwrap();
    let path = annotation::sidecar_path(&dir.path().join("tray.png"), None);
    assert!(path.ends_with("tray.png.regions.json"));
    assert_eq!(annotation::load(&path).unwrap(), None, "absent file");
    let sc = sample_sidecar();
    annotation::save(&path, &sc).unwrap();
    let back = annotation::load_with_warnings(&path).unwrap().unwrap();
    assert_eq!(back.0, sc);
    assert!(back.1.is_empty());
    let v: Value = serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    assert_eq!(v["schema"], "mullion-regions");
    assert_eq!(v["version"], 1);
    assert_eq!(v["regions"][0]["shape"]["kind"], "box");
    assert_eq!(v["regions"][1]["shape"]["kind"], "polygon");
    assert_eq!(v["pins"][0]["text"], "check again next week");
    assert_eq!(sc.labels.len(), 2);
    assert_ne!(sc.labels[0].colour, sc.labels[1].colour);
    // Nothing but the sidecar is left in the folder.
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
}

/// Write `bytes` as a sidecar, load it, and check the error and the moved-aside copy.
fn expect_unreadable(dir: &Path, bytes: &[u8], problem: &str) -> String {
    let path = dir.join("x.png.regions.json");
    std::fs::write(&path, bytes).unwrap();
    let before = unreadable_copies(dir);
    let err = annotation::load(&path).unwrap_err().to_string();
    assert!(err.contains(&path.display().to_string()), "{err}");
    assert!(err.contains(problem), "{err}");
    assert!(!path.exists(), "the bad file is moved away");
    let after = unreadable_copies(dir);
    assert_eq!(after.len(), before.len() + 1);
    let moved = after.iter().find(|p| !before.contains(p)).unwrap();
    assert!(err.contains(&moved.display().to_string()), "{err}");
    assert_eq!(std::fs::read(moved).unwrap(), bytes, "moved byte for byte");
    err
}

#[test]
fn sidecar_schema_and_version_are_checked() {
    let dir = tempfile::tempdir().unwrap();
    let good = annotation::to_json(&sample_sidecar()).unwrap();
    // A newer version is a newer Mullion's file: refused, left in place, never moved.
    let newer = good.replace("\"version\": 1", "\"version\": 2");
    assert_ne!(newer, good);
    let path = dir.path().join("x.png.regions.json");
    std::fs::write(&path, &newer).unwrap();
    let err = annotation::load(&path).unwrap_err().to_string();
    assert!(
        err.contains("newer") && err.contains("left in place"),
        "{err}"
    );
    assert_eq!(std::fs::read_to_string(&path).unwrap(), newer);
    assert!(unreadable_copies(dir.path()).is_empty());
    std::fs::remove_file(&path).unwrap();
    let other = good.replace("mullion-regions", "someone-else");
    expect_unreadable(dir.path(), other.as_bytes(), "schema is 'someone-else'");
    let older = good.replace("\"version\": 1", "\"version\": 0");
    expect_unreadable(dir.path(), older.as_bytes(), "unknown schema version 0");
    let names = unreadable_copies(dir.path());
    assert!(names[0].ends_with("x.png.regions.json.unreadable"));
    assert!(names[1].ends_with("x.png.regions.json.unreadable-2"));
}

#[test]
fn malformed_and_truncated_sidecars_are_moved_aside() {
    let dir = tempfile::tempdir().unwrap();
    let good = annotation::to_json(&sample_sidecar()).unwrap();
    expect_unreadable(
        dir.path(),
        &good.as_bytes()[..good.len() / 2],
        "not valid JSON",
    );
    expect_unreadable(dir.path(), b"", "not valid JSON");
    expect_unreadable(dir.path(), b"[1, 2, 3]", "JSON object");
    expect_unreadable(dir.path(), &[0xff, 0xfe, 0x00, 0x7b], "UTF-8");
    let bad_shape = good.replace("\"box\"", "\"circle\"");
    expect_unreadable(dir.path(), bad_shape.as_bytes(), "circle");
    let zero = good.replace("\"width\": 64", "\"width\": 0");
    expect_unreadable(dir.path(), zero.as_bytes(), "zero side");
    // A new save afterwards does not touch the moved copies.
    let path = dir.path().join("x.png.regions.json");
    annotation::save(&path, &sample_sidecar()).unwrap();
    assert_eq!(unreadable_copies(dir.path()).len(), 6);
}

#[test]
fn an_interrupted_save_leaves_the_previous_file_intact() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("tray.png.regions.json");
    let first = sample_sidecar();
    annotation::save(&path, &first).unwrap();
    let first_bytes = std::fs::read(&path).unwrap();
    let mut second = first.clone();
    second.regions.clear();

    // A crash after writing the temporary file but before the rename leaves a partial temp
    // file: the sidecar itself still reads as before.
    let tmp = dir.path().join(".tray.png.regions.json.partial");
    let second_json = annotation::to_json(&second).unwrap();
    std::fs::write(&tmp, &second_json.as_bytes()[..10]).unwrap();
    assert_eq!(annotation::load(&path).unwrap().unwrap(), first);
    assert_eq!(std::fs::read(&path).unwrap(), first_bytes);

    // A save that fails half-way through its temporary file changes nothing and removes it.
    let err = mullion::io::write_atomic(&path, |tmp| {
        std::fs::write(tmp, &second_json.as_bytes()[..10]).unwrap();
        Err(mullion::Error::bad_file(&path, "disk full (simulated)"))
    })
    .unwrap_err()
    .to_string();
    assert!(err.contains("tray.png.regions.json"), "{err}");
    assert_eq!(std::fs::read(&path).unwrap(), first_bytes);
    let names: Vec<String> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(
        names.len(),
        2,
        "only the sidecar and the crash's leftover: {names:?}"
    );
    std::fs::remove_file(&tmp).unwrap();

    // The next save goes through and leaves no temporary file behind.
    annotation::save(&path, &second).unwrap();
    assert_eq!(annotation::load(&path).unwrap().unwrap(), second);
    assert!(!tmp.exists());
}

fn cells_of(name: &str) -> mullion::demo::tray::SceneLabels {
    let p = sample_data().join(format!("{name}.cells.json"));
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

#[test]
fn demo_cells_become_labelled_boxes() {
    let cells = cells_of("tray-01-333x250");
    let sc = mullion::demo::sidecars::from_scene_labels(&cells);
    let between = cells.weeds.iter().filter(|w| w.cell.is_none()).count();
    assert_eq!(sc.regions.len(), cells.cells.len() + between);
    let names: Vec<&str> = sc.labels.iter().map(|l| l.name.as_str()).collect();
    assert_eq!(names, ["empty", "healthy", "wilted", "weed"]);
    for (r, c) in sc.regions.iter().zip(&cells.cells) {
        assert_eq!(r.label, c.class.name());
        assert!(matches!(r.shape, Shape::Box { .. }));
    }
}

/// The committed sample sidecars are what the converter makes of the committed cell files.
#[test]
fn committed_sample_sidecars_are_current() {
    let mut checked = 0;
    for name in [
        "tray-01-333x250",
        "tray-03-97x160",
        "tray-05-224x224",
        "tray-06-224x224",
    ] {
        let path = annotation::sidecar_path(&sample_data().join(format!("{name}.png")), None);
        let on_disk = annotation::load_with_warnings(&path).unwrap().unwrap();
        assert!(on_disk.1.is_empty(), "{:?}", on_disk.1);
        let mut fresh = mullion::demo::sidecars::from_scene_labels(&cells_of(name));
        annotation::validate(&mut fresh);
        assert_eq!(
            on_disk.0, fresh,
            "{name}: run `mullion sample-data --out sample-data`"
        );
        checked += 1;
    }
    assert_eq!(checked, 4);
}

/// `mullion sample-data` makes every committed sample file again, byte for byte: the tray
/// images, their cell labels and the region sidecars.
#[test]
fn sample_data_command_regenerates_the_committed_files() {
    let dir = tempfile::tempdir().unwrap();
    let run = crate::common::mullion(&["sample-data", "--out", dir.path().to_str().unwrap()]);
    assert!(run.ok(), "{}", run.stderr);
    let mut kinds = std::collections::BTreeMap::new();
    for e in std::fs::read_dir(dir.path()).unwrap() {
        let p = e.unwrap().path();
        let name = p.file_name().unwrap().to_string_lossy().into_owned();
        assert!(!name.ends_with(".partial"), "temporary file left: {name}");
        let committed = sample_data().join(&name);
        assert_eq!(
            std::fs::read(&p).unwrap(),
            std::fs::read(&committed).unwrap_or_default(),
            "{name} differs from the committed sample-data/{name}"
        );
        let kind = name.split_once('.').map_or("", |(_, k)| k).to_string();
        *kinds.entry(kind).or_insert(0) += 1;
    }
    assert_eq!(kinds.get("png"), Some(&8), "{kinds:?}");
    assert_eq!(kinds.get("cells.json"), Some(&8), "{kinds:?}");
    assert_eq!(kinds.get("png.regions.json"), Some(&8), "{kinds:?}");
}

// ---------------------------------------------------------------------------------------------
// The report command

const IMAGES: [&str; 3] = [
    "tray-03-97x160.png",
    "tray-05-224x224.png",
    "tray-06-224x224.png",
];

struct Setup {
    _dir: tempfile::TempDir,
    images: PathBuf,
    out: PathBuf,
    run: SessionOptions,
}

fn setup() -> Setup {
    let dir = tempfile::tempdir().unwrap();
    let config = Config {
        embed_dim: 16,
        depths: vec![2, 2, 2],
        heads: vec![1, 2, 4],
        ..Config::tiny()
    };
    let sd = random_timm_state_dict(&config, 7).unwrap();
    let weights = dir.path().join("random.safetensors");
    let map: std::collections::HashMap<_, _> = sd.into_iter().collect();
    candle_core::safetensors::save(&map, &weights).unwrap();
    let images = dir.path().join("images");
    std::fs::create_dir(&images).unwrap();
    for name in IMAGES {
        std::fs::copy(sample_data().join(name), images.join(name)).unwrap();
        let sc = annotation::sidecar_path(&sample_data().join(name), None);
        std::fs::copy(&sc, annotation::sidecar_path(&images.join(name), None)).unwrap();
    }
    let out = dir.path().join("report");
    let run = SessionOptions::new(weights);
    Setup {
        _dir: dir,
        images,
        out,
        run,
    }
}

const COLUMNS: [&str; 11] = [
    "image",
    "region",
    "label",
    "stage",
    "map",
    "inside_mean",
    "outside_mean",
    "ratio",
    "auroc",
    "tokens",
    "coverage",
];

fn header(path: &Path) -> Vec<String> {
    let mut r = csv::Reader::from_path(path).unwrap();
    r.headers().unwrap().iter().map(String::from).collect()
}

#[test]
fn report_table_summary_rerun_and_force() {
    let s = setup();
    let args = ReportOptions::new(s.run.clone(), s.images.clone(), s.out.clone());
    let o = report::run_report(&args).unwrap();
    assert_eq!(o.computed, IMAGES);
    assert!(o.reused.is_empty());
    assert_eq!(header(&o.csv), COLUMNS);
    let rows = report::read_rows(&o.csv).unwrap();
    assert_eq!(rows.len(), o.rows);
    let mut expected_rows = 0;
    for name in IMAGES {
        let sc = annotation::load(&annotation::sidecar_path(&s.images.join(name), None))
            .unwrap()
            .unwrap();
        expected_rows += sc.regions.len() * 3;
    }
    assert_eq!(rows.len(), expected_rows);
    let mut with_auroc = 0;
    for r in &rows {
        assert_eq!(r.map, "norm");
        // A cell smaller than two tokens of a coarse stage may hold no token at weight >= 0.5.
        match r.auroc {
            Some(a) => {
                assert!((0.0..=1.0).contains(&a), "{r:?}");
                assert!(r.tokens > 0);
                with_auroc += 1;
            }
            None => assert_eq!(r.tokens, 0, "{r:?}"),
        }
        assert!(r.ratio.unwrap() > 0.0, "{r:?}");
        assert!(r.coverage > 0.0 && r.coverage < 1.0, "{r:?}");
    }
    assert!(
        with_auroc * 2 > rows.len(),
        "{with_auroc} of {}",
        rows.len()
    );

    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(s.out.join("summary.json")).unwrap())
            .unwrap();
    assert_eq!(summary["caution"], CAUTION);
    assert_eq!(
        CAUTION,
        "Response maps show where features are large, not why the model decides; they are no evidence of safety for high-stakes use, where local rules and qualified review come first."
    );
    assert_eq!(summary["failed"].as_array().unwrap().len(), 0);
    let groups = summary["groups"].as_array().unwrap();
    let total: u64 = groups.iter().map(|g| g["count"].as_u64().unwrap()).sum();
    assert_eq!(total as usize, rows.len());
    // The summary's means are the means of the table's rows.
    let g = &groups[0];
    let (label, stage) = (
        g["label"].as_str().unwrap(),
        g["stage"].as_u64().unwrap() as usize,
    );
    let vals: Vec<f64> = rows
        .iter()
        .filter(|r| r.label == label && r.stage == stage)
        .map(|r| r.auroc.unwrap())
        .collect();
    let mean = vals.iter().sum::<f64>() / vals.len() as f64;
    assert!(close(g["auroc"]["mean"].as_f64().unwrap(), mean, 1e-12));
    if vals.len() > 1 {
        let var = vals.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (vals.len() - 1) as f64;
        assert!(close(g["auroc"]["std"].as_f64().unwrap(), var.sqrt(), 1e-9));
    }

    // The table's numbers are exactly what region_stats gives when called directly.
    let session = Session::open(&s.run).unwrap();
    let kind = parse_map_kind("norm").unwrap();
    for name in IMAGES {
        let img = s.images.join(name);
        let sc = annotation::load(&annotation::sidecar_path(&img, None))
            .unwrap()
            .unwrap();
        let out = session.run_image(&img, false, false).unwrap();
        let maps: Vec<Map> = (0..out.stages.len())
            .map(|i| kind.compute(&out, i).unwrap())
            .collect();
        let direct = region_stats(&out, &maps, &kind.id(), &sc.regions, name).unwrap();
        let table: Vec<_> = rows.iter().filter(|r| r.image == name).collect();
        assert_eq!(direct.len(), table.len());
        for (d, t) in direct.iter().zip(table) {
            assert_eq!((d.region, &d.label, d.stage), (t.region, &t.label, t.stage));
            assert_eq!(d.inside_mean, t.inside_mean);
            assert_eq!(d.outside_mean, t.outside_mean);
            assert_eq!(d.ratio, t.ratio);
            assert_eq!(d.auroc, t.auroc);
            assert_eq!(d.tokens, t.tokens);
            assert_eq!(d.coverage, t.coverage);
        }
    }

    // Rerun: nothing is recomputed, the table is the same.
    let csv_bytes = std::fs::read(&o.csv).unwrap();
    let again = report::run_report(&args).unwrap();
    assert!(again.computed.is_empty(), "{:?}", again.computed);
    assert_eq!(again.reused, IMAGES);
    assert_eq!(std::fs::read(&o.csv).unwrap(), csv_bytes);

    // An edited sidecar makes its image count as new.
    let edited = annotation::sidecar_path(&s.images.join(IMAGES[1]), None);
    let mut sc = annotation::load(&edited).unwrap().unwrap();
    sc.regions.truncate(2);
    annotation::save(&edited, &sc).unwrap();
    let third = report::run_report(&args).unwrap();
    assert_eq!(third.computed, [IMAGES[1]]);
    let rows3 = report::read_rows(&third.csv).unwrap();
    assert_eq!(rows3.iter().filter(|r| r.image == IMAGES[1]).count(), 2 * 3);

    // --force recomputes everything.
    let forced = ReportOptions {
        force: true,
        ..args.clone()
    };
    let f = report::run_report(&forced).unwrap();
    assert_eq!(f.computed, IMAGES);
    assert_eq!(report::read_rows(&f.csv).unwrap(), rows3);
    // No temporary file is left in the output folder.
    for e in std::fs::read_dir(&s.out).unwrap() {
        let n = e.unwrap().file_name().to_string_lossy().into_owned();
        assert!(!n.ends_with(".partial"), "{n}");
    }
}

#[test]
fn report_lists_a_broken_image_and_does_the_others() {
    let s = setup();
    // A file that is no image, with a sidecar so it is not skipped as unlabelled.
    let broken = s.images.join("broken.png");
    std::fs::write(&broken, b"this is not a PNG").unwrap();
    let donor = annotation::sidecar_path(&s.images.join(IMAGES[0]), None);
    std::fs::copy(&donor, annotation::sidecar_path(&broken, None)).unwrap();
    // And an image without any sidecar.
    std::fs::copy(
        sample_data().join("tray-01-333x250.png"),
        s.images.join("unlabelled.png"),
    )
    .unwrap();
    let args = ReportOptions::new(s.run.clone(), s.images.clone(), s.out.clone());
    let o = report::run_report(&args).unwrap();
    assert_eq!(o.computed, IMAGES);
    assert_eq!(o.summary.failed.len(), 1);
    assert_eq!(o.summary.failed[0].image, "broken.png");
    assert!(
        o.summary.failed[0].error.contains("broken.png"),
        "{:?}",
        o.summary.failed
    );
    assert_eq!(o.summary.without_regions, ["unlabelled.png"]);
    let rows = report::read_rows(&o.csv).unwrap();
    assert!(rows.iter().all(|r| r.image != "broken.png"));
    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(s.out.join("summary.json")).unwrap())
            .unwrap();
    assert_eq!(summary["failed"][0]["image"], "broken.png");
    // The command itself reports the failure after writing everything, with a runtime status.
    let cmd = crate::common::mullion(&[
        "report",
        "--weights",
        s.run.weights.to_str().unwrap(),
        "--images",
        s.images.to_str().unwrap(),
        "--out",
        s.out.to_str().unwrap(),
    ]);
    assert_eq!(cmd.code, 1, "{}", cmd.stderr);
    assert!(cmd.stderr.contains("1 of 5 images"), "{}", cmd.stderr);
    // The broken image is tried again on the rerun; the others are reused.
    let again = report::run_report(&args).unwrap();
    assert_eq!(again.reused, IMAGES);
    assert_eq!(again.summary.failed.len(), 1);
}

#[test]
fn report_with_a_regions_folder_and_figures() {
    let s = setup();
    // Move the sidecars into a project folder.
    let project = s.out.parent().unwrap().join("project");
    std::fs::create_dir(&project).unwrap();
    for name in IMAGES {
        let from = annotation::sidecar_path(&s.images.join(name), None);
        std::fs::rename(
            &from,
            annotation::sidecar_path(&s.images.join(name), Some(&project)),
        )
        .unwrap();
    }
    let mut args = ReportOptions::new(s.run.clone(), s.images.clone(), s.out.clone());
    let without = report::run_report(&args).unwrap();
    assert_eq!(without.summary.without_regions.len(), 3);
    args.regions = Some(project);
    args.figures = true;
    let o = report::run_report(&args).unwrap();
    assert_eq!(o.computed, IMAGES);
    for name in IMAGES {
        let figure = mullion::io::figure_file_name(std::path::Path::new(name), "norm");
        let fig = image::open(s.out.join("figures").join(figure)).unwrap();
        assert!(fig.width() > 300 && fig.height() > 200);
    }
    // Figures count as part of being done: a missing one is made again.
    std::fs::remove_file(s.out.join("figures").join(mullion::io::figure_file_name(
        std::path::Path::new(IMAGES[2]),
        "norm",
    )))
    .unwrap();
    let again = report::run_report(&args).unwrap();
    assert_eq!(again.computed, [IMAGES[2]]);
}

#[test]
fn report_rejects_colour_maps_and_empty_folders() {
    let s = setup();
    let mut args = ReportOptions::new(s.run.clone(), s.images.clone(), s.out.clone());
    args.map = std::sync::Arc::from(parse_map_kind("pca").unwrap());
    let err = report::run_report(&args).unwrap_err().to_string();
    assert!(err.contains("scalar"), "{err}");
    let empty = s.out.parent().unwrap().join("empty");
    std::fs::create_dir(&empty).unwrap();
    let args = ReportOptions::new(s.run.clone(), empty.clone(), s.out.clone());
    let err = report::run_report(&args).unwrap_err().to_string();
    assert!(err.contains("no images") && err.contains("empty"), "{err}");
}

#[test]
fn report_options_parse() {
    use clap::{CommandFactory, Parser};
    #[derive(Parser, Debug)]
    struct Cli {
        #[command(flatten)]
        report: mullion::commands::report::ReportArgs,
    }
    // clap checks its own definitions only in debug builds; ask for it here.
    Cli::command().debug_assert();
    let c = Cli::try_parse_from([
        "report",
        "--weights",
        "w.safetensors",
        "--images",
        "imgs",
        "--out",
        "res",
        "--regions",
        "proj",
        "--map",
        "channel:3",
        "--figures",
        "--force",
    ])
    .unwrap();
    let r = c.report;
    assert_eq!(r.run.weights, PathBuf::from("w.safetensors"));
    assert_eq!(r.images, PathBuf::from("imgs"));
    assert_eq!(r.out, PathBuf::from("res"));
    assert_eq!(r.regions, Some(PathBuf::from("proj")));
    assert_eq!(r.map.0.id(), "channel:3");
    assert!(r.figures && r.force);
    let d = Cli::try_parse_from(["report", "--weights", "w", "--images", "i", "--out", "o"])
        .unwrap()
        .report;
    assert_eq!(
        (d.map.0.id().as_str(), d.figures, d.force, d.regions),
        ("norm", false, false, None)
    );
}

#[test]
fn a_folder_in_the_sidecar_place_is_refused_not_moved() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("x.png.regions.json");
    std::fs::create_dir(&path).unwrap();
    let err = annotation::load(&path).unwrap_err().to_string();
    assert!(err.contains("folder"), "{err}");
    assert!(path.is_dir());
}
