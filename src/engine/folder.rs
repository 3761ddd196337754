//! A transformers checkpoint as it travels: a folder with `config.json` beside
//! `model.safetensors` (or `pytorch_model.bin`).
//!
//! The weights alone cannot tell everything: transformers' Swinv2 fixes each stage's window from
//! `image_size` when the model is built, and normalises its position bias coordinates by
//! `pretrained_window_sizes`. When a `config.json` sits beside the opened file (or the folder
//! itself is opened) its fields are read here into a [`ConfigOverride`] that the loader places
//! between the tensors and an explicit `--config` file (which still wins).

use super::config::{ConfigOverride, TrainedWindow, WindowSpec, MAX_PATCH, MAX_WINDOW};
use crate::error::{Error, Result};
use serde_json::Value;
use std::path::{Path, PathBuf};

/// Largest `config.json` read (bytes); a real one is a few hundred.
const MAX_JSON_BYTES: u64 = 1 << 20;

/// The weight files a transformers folder holds, in order of preference.
const FOLDER_WEIGHTS: [&str; 2] = ["model.safetensors", "pytorch_model.bin"];

/// The weights file to open for `path`: itself, or for a folder the weights inside it.
pub fn weights_file(path: &Path) -> Result<PathBuf> {
    if !path.is_dir() {
        return Ok(path.to_path_buf());
    }
    FOLDER_WEIGHTS
        .iter()
        .map(|n| path.join(n))
        .find(|p| p.is_file())
        .ok_or_else(|| {
            Error::bad_file(
                path,
                format!(
                    "a folder without weights: expected {} inside it",
                    FOLDER_WEIGHTS.join(" or ")
                ),
            )
        })
}

/// Whether `path` is a checkpoint as transformers and timm save one: a folder with
/// `config.json` and the weights inside it (so the window opens it as a checkpoint, not as a
/// folder of images).
pub fn is_checkpoint_folder(path: &Path) -> bool {
    path.is_dir()
        && path.join("config.json").is_file()
        && FOLDER_WEIGHTS.iter().any(|n| path.join(n).is_file())
}

/// What a `config.json` beside the weights said.
#[derive(Clone, Debug)]
pub struct BesideConfig {
    pub path: PathBuf,
    /// `model_type` (`swin`, `swinv2`, ...).
    pub model_type: Option<String>,
    /// The shape fields, as an override beneath the user's.
    pub over: ConfigOverride,
    /// `layer_norm_eps` (the blocks' and the final norm's).
    pub layer_norm_eps: Option<f32>,
    /// The fields taken from it, in words for the load report.
    pub fields: Vec<String>,
    /// Why nothing was taken from it (not a transformers Swin configuration).
    pub ignored: Option<String>,
}

/// Read the `config.json` beside `weights`, if there is one.
pub fn read_beside(weights: &Path) -> Result<Option<BesideConfig>> {
    let Some(dir) = weights.parent() else {
        return Ok(None);
    };
    let path = dir.join("config.json");
    let Some(bytes) = crate::io::read_regular(&path, MAX_JSON_BYTES)? else {
        return Ok(None);
    };
    // Only a transformers Swin configuration says anything about these weights; any other
    // config.json beside them (another tool's) is named in the load report and left alone.
    let ignore = |why: String| BesideConfig {
        path: path.clone(),
        model_type: None,
        over: ConfigOverride::default(),
        layer_norm_eps: None,
        fields: Vec::new(),
        ignored: Some(why),
    };
    let v: Value = match serde_json::from_slice(&bytes) {
        Ok(v) => v,
        Err(e) => return Ok(Some(ignore(format!("not valid JSON ({e})")))),
    };
    match v["model_type"].as_str() {
        Some("swin" | "swinv2") => parse(&path, &v).map(Some),
        Some(other) => Ok(Some(ignore(format!(
            "model_type '{other}' is not a Swin model"
        )))),
        None => match timm_model_args(&v) {
            Some((arch, args)) => parse(&path, &args).map(|mut b| {
                b.fields[0] = format!("timm architecture {arch}");
                Some(b)
            }),
            None => Ok(Some(ignore(
                "neither a transformers configuration (model_type) nor a timm one (a swin \
                 architecture)"
                    .into(),
            ))),
        },
    }
}

/// A `config.json` as timm writes it beside exported weights (`architecture`, `model_args`,
/// `pretrained_cfg`; timm 1.0.31's `save_config_for_hf`), for a Swin architecture: its
/// `model_args` in transformers' field names, ready for [`parse`]. The window comes from
/// `model_args.window_size`, or else from a plain `windowN` in the architecture name (timm's
/// published names, e.g. `swinv2_tiny_window8_256`); a name that changes its window
/// (`window12to16`) does not say the per-stage pretrained windows, so it gives none.
fn timm_model_args(v: &Value) -> Option<(String, Value)> {
    let arch = v["architecture"].as_str()?;
    let model_type = if arch.starts_with("swinv2_") {
        "swinv2"
    } else if arch.starts_with("swin_") {
        "swin"
    } else {
        return None;
    };
    let mut args = match &v["model_args"] {
        Value::Object(m) => m.clone(),
        _ => serde_json::Map::new(),
    };
    // timm builds V2 windows from the input at run time; `img_size` is not an as-built size.
    args.remove("img_size");
    args.insert("model_type".into(), model_type.into());
    if !args.contains_key("window_size") {
        let named = arch
            .split('_')
            .find_map(|part| part.strip_prefix("window"))
            .and_then(|n| n.parse::<u64>().ok());
        if let Some(w) = named {
            args.insert("window_size".into(), w.into());
        }
    }
    Some((arch.to_string(), Value::Object(args)))
}

fn parse(path: &Path, v: &Value) -> Result<BesideConfig> {
    let bad = |field: &str, what: &str| {
        Error::bad_file(
            path,
            format!("\"{field}\" is {}; expected {what}", v[field]),
        )
    };
    let int = |field: &str, max: usize| -> Result<Option<usize>> {
        match &v[field] {
            Value::Null => Ok(None),
            x => x
                .as_u64()
                .map(|n| n as usize)
                .filter(|&n| n <= max)
                .map(Some)
                .ok_or_else(|| bad(field, &format!("a whole number up to {max}"))),
        }
    };
    let list = |field: &str, max: usize| -> Result<Option<Vec<usize>>> {
        match &v[field] {
            Value::Null => Ok(None),
            Value::Array(a) if a.len() <= super::config::MAX_STAGES => a
                .iter()
                .map(|x| x.as_u64().map(|n| n as usize).filter(|&n| n <= max))
                .collect::<Option<Vec<_>>>()
                .map(Some)
                .ok_or_else(|| bad(field, &format!("a list of whole numbers up to {max}"))),
            _ => Err(bad(field, "a list of whole numbers, one per stage")),
        }
    };
    let mut fields = Vec::new();
    let mut note = |name: &str, present: bool| {
        if present {
            fields.push(name.to_string());
        }
    };
    let model_type = v["model_type"].as_str().map(String::from);
    let mut over = ConfigOverride::default();
    // Whatever the image size, a side beyond this is no image Mullion runs.
    const MAX_BUILT: usize = 1 << 20;
    over.built_for = match &v["image_size"] {
        Value::Null => None,
        Value::Array(a) if a.len() == 2 => {
            let side = |x: &Value| x.as_u64().map(|n| n as usize).filter(|&n| n <= MAX_BUILT);
            match (side(&a[0]), side(&a[1])) {
                (Some(h), Some(w)) => Some(WindowSpec::Rect([h, w])),
                _ => return Err(bad("image_size", "a size or [height, width]")),
            }
        }
        _ => int("image_size", MAX_BUILT)?.map(WindowSpec::Square),
    };
    note("image_size", over.built_for.is_some());
    over.patch = int("patch_size", MAX_PATCH)?.filter(|&p| p > 0);
    note("patch_size", over.patch.is_some());
    over.window = int("window_size", MAX_WINDOW)?
        .filter(|&w| w > 0)
        .map(WindowSpec::Square);
    note("window_size", over.window.is_some());
    over.trained_window = list("pretrained_window_sizes", MAX_WINDOW)?
        .filter(|_| model_type.as_deref() != Some("swin"))
        .map(TrainedWindow::PerStage);
    note("pretrained_window_sizes", over.trained_window.is_some());
    over.depths = list("depths", super::config::MAX_BLOCKS_PER_STAGE)?;
    note("depths", over.depths.is_some());
    over.heads = list("num_heads", super::config::MAX_HEADS)?;
    note("num_heads", over.heads.is_some());
    over.embed_dim = int("embed_dim", super::config::MAX_CHANNELS)?.filter(|&c| c > 0);
    note("embed_dim", over.embed_dim.is_some());
    over.mlp_ratio = match &v["mlp_ratio"] {
        Value::Null => None,
        x => Some(
            x.as_f64()
                .filter(|r| *r > 0.0 && *r <= super::config::MAX_MLP_RATIO)
                .ok_or_else(|| bad("mlp_ratio", "a positive number"))?,
        ),
    };
    note("mlp_ratio", over.mlp_ratio.is_some());
    let layer_norm_eps = match &v["layer_norm_eps"] {
        Value::Null => None,
        x => Some(
            x.as_f64()
                .filter(|e| *e > 0.0 && *e < 1.0)
                .ok_or_else(|| bad("layer_norm_eps", "a small positive number"))?
                as f32,
        ),
    };
    note("layer_norm_eps", layer_norm_eps.is_some());
    if let Some(t) = &model_type {
        fields.insert(0, format!("model_type {t}"));
    }
    Ok(BesideConfig {
        path: path.to_path_buf(),
        model_type,
        over,
        layer_norm_eps,
        fields,
        ignored: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Field names and values as transformers 5.23.0's Swinv2Config writes them (config.json of
    // tests/fixtures/tfv2_backbone_odd, made by save_pretrained).
    #[test]
    fn reads_the_fields_transformers_writes() {
        let v: Value = serde_json::from_str(
            r#"{"model_type": "swinv2", "image_size": 64, "patch_size": 4, "window_size": 8,
                "pretrained_window_sizes": [0, 6, 0, 0], "depths": [2, 2, 2, 2],
                "num_heads": [1, 2, 2, 4], "embed_dim": 8, "mlp_ratio": 2.0,
                "layer_norm_eps": 1e-05, "out_features": ["stage1"]}"#,
        )
        .unwrap();
        let b = parse(Path::new("config.json"), &v).unwrap();
        assert_eq!(b.model_type.as_deref(), Some("swinv2"));
        assert!(matches!(b.over.built_for, Some(WindowSpec::Square(64))));
        assert_eq!(b.over.depths, Some(vec![2, 2, 2, 2]));
        assert_eq!(
            b.over.trained_window.unwrap().per_stage(4),
            vec![None, Some((6, 6)), None, None]
        );
        assert_eq!(b.layer_norm_eps, Some(1e-5));
        assert!(b.fields.contains(&"pretrained_window_sizes".to_string()));
    }

    #[test]
    fn another_tools_config_is_left_alone() {
        let dir = tempfile::tempdir().unwrap();
        let weights = dir.path().join("w.safetensors");
        std::fs::write(dir.path().join("config.json"), r#"{"depths": "deep"}"#).unwrap();
        let b = read_beside(&weights).unwrap().unwrap();
        assert!(b.ignored.unwrap().contains("model_type"));
        assert!(b.fields.is_empty() && b.over.depths.is_none());
    }

    #[test]
    fn a_bad_field_names_the_file_and_field() {
        let v: Value =
            serde_json::from_str(r#"{"model_type": "swinv2", "window_size": "eight"}"#).unwrap();
        let e = parse(Path::new("/x/config.json"), &v)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("config.json") && e.contains("window_size"),
            "{e}"
        );
    }

    // timm's published names (timm 1.0.31's model registry): a plain `windowN` gives the window;
    // `window12to16` (fine-tuned at another window) says no per-stage pretrained windows.
    #[test]
    fn a_timm_architecture_name_gives_a_plain_window_only() {
        let args = |arch: &str| {
            let v = serde_json::json!({"architecture": arch, "num_classes": 1000});
            timm_model_args(&v)
        };
        let (_, a) = args("swinv2_small_window16_256").unwrap();
        assert_eq!(a["window_size"], 16);
        assert_eq!(a["model_type"], "swinv2");
        let (_, a) = args("swinv2_base_window12to16_192to256").unwrap();
        assert!(a.get("window_size").is_none());
        let (_, a) = args("swin_tiny_patch4_window7_224").unwrap();
        assert_eq!(
            (a["window_size"].as_u64(), a["model_type"].as_str()),
            (Some(7), Some("swin"))
        );
        assert!(args("vit_base_patch16_224").is_none());
    }
}
