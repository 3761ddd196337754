//! Files, for every layer: atomic writes (temporary file in the same folder, then rename), PNG and
//! tensor files written that way, the file endings Mullion reads, and listing the images of a
//! folder.
//!
//! Nothing here knows about models, maps or windows; every other module may use it.

use crate::error::{Error, Result};
use candle_core::Tensor;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

/// Image file endings Mullion opens (compared without regard to case).
pub const IMAGE_EXTENSIONS: [&str; 7] = ["png", "jpg", "jpeg", "webp", "tif", "tiff", "bmp"];
/// Checkpoint file endings.
pub const WEIGHT_EXTENSIONS: [&str; 4] = ["safetensors", "pth", "pt", "bin"];

/// Whether `path` ends in one of `list` (without the dot, any case).
pub fn has_extension(path: &Path, list: &[&str]) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| list.iter().any(|x| x.eq_ignore_ascii_case(e)))
}

/// Whether `path` names an image by its ending.
pub fn is_image_path(path: &Path) -> bool {
    has_extension(path, &IMAGE_EXTENSIONS)
}

/// Whether `path` names a checkpoint by its ending.
pub fn is_weights_path(path: &Path) -> bool {
    has_extension(path, &WEIGHT_EXTENSIONS)
}

/// The file name of `path` for messages and tables, or the whole path when it has none.
pub fn file_name(path: &Path) -> String {
    path.file_name().map_or_else(
        || path.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    )
}

/// Image files directly inside `dir` (sub-folders are not searched), sorted by name.
pub fn list_images(dir: &Path) -> Result<Vec<PathBuf>> {
    let rd = std::fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
    let mut out: Vec<PathBuf> = rd
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_file() && is_image_path(p))
        .collect();
    out.sort();
    Ok(out)
}

/// The folder a file at `path` lands in (`.` for a bare file name).
fn parent_dir(path: &Path) -> &Path {
    path.parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
}

/// A temporary name next to `path`, unique to this process and call, so two writers of one
/// target never share a temporary file.
fn temp_path(path: &Path) -> Result<PathBuf> {
    static COUNTER: AtomicU64 = AtomicU64::new(0);
    let name = path
        .file_name()
        .ok_or_else(|| Error::BadArgument(format!("{}: not a file name", path.display())))?;
    let n = COUNTER.fetch_add(1, Ordering::Relaxed);
    Ok(parent_dir(path).join(format!(
        ".{}.{}-{n}.partial",
        name.to_string_lossy(),
        std::process::id()
    )))
}

/// Run `write` on a temporary path next to `path`, then rename it over `path`, so a reader never
/// sees a half-written file. The temporary file is removed on failure.
pub fn write_atomic(path: &Path, write: impl FnOnce(&Path) -> Result<()>) -> Result<()> {
    let dir = parent_dir(path);
    if !dir.is_dir() {
        return Err(Error::bad_file(
            path,
            format!("the folder {} does not exist", dir.display()),
        ));
    }
    let tmp = temp_path(path)?;
    // Probe first so an unwritable folder gives a plain message naming the target.
    std::fs::File::create(&tmp).map_err(|e| {
        Error::bad_file(
            path,
            format!("cannot write in the folder {}: {e}", dir.display()),
        )
    })?;
    let result =
        write(&tmp).and_then(|()| std::fs::rename(&tmp, path).map_err(|e| Error::io(path, e)));
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// Write `text` to `path` atomically.
pub fn write_text_atomic(path: &Path, text: &str) -> Result<()> {
    write_atomic(path, |tmp| {
        std::fs::write(tmp, text.as_bytes()).map_err(|e| Error::io(path, e))
    })
}

/// Save an image as PNG atomically.
pub fn save_png_atomic(img: &image::RgbaImage, path: &Path) -> Result<()> {
    write_atomic(path, |tmp| {
        img.save_with_format(tmp, image::ImageFormat::Png)
            .map_err(|e| Error::bad_file(path, format!("cannot write the PNG: {e}")))
    })
}

/// Write tensors to a safetensors file atomically.
pub fn save_tensors(tensors: &HashMap<String, Tensor>, out: &Path) -> Result<()> {
    let dir = parent_dir(out);
    if !dir.is_dir() {
        return Err(Error::bad_file(dir, "the output folder does not exist"));
    }
    write_atomic(out, |tmp| {
        candle_core::safetensors::save(tensors, tmp)
            .map_err(|e| Error::bad_file(out, format!("cannot write: {e}")))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn extensions_ignore_case() {
        assert!(is_image_path(Path::new("a/B.PNG")));
        assert!(is_weights_path(Path::new("x.Safetensors")));
        assert!(!is_image_path(Path::new("x.safetensors")));
        assert!(!is_image_path(Path::new("noext")));
    }

    #[test]
    fn atomic_write_replaces_and_leaves_no_temporary() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("a.txt");
        write_text_atomic(&p, "one").unwrap();
        write_text_atomic(&p, "two").unwrap();
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "two");
        let failed = write_atomic(&p, |_| Err(Error::Internal("boom".into())));
        assert!(failed.is_err());
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "two");
        let names: Vec<String> = std::fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names, ["a.txt"]);
    }

    #[test]
    fn temporary_names_differ_per_call() {
        let p = Path::new("out/x.csv");
        assert_ne!(temp_path(p).unwrap(), temp_path(p).unwrap());
    }
}
