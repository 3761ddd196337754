//! Files, for every layer: atomic writes (temporary file in the same folder, then rename), PNG and
//! tensor files written that way, the file endings Mullion reads, listing the images of a
//! folder, the lock a run holds on its output folder, the checks that an output is neither one
//! of the run's inputs nor anything but a regular file, bounded reads of small files, and
//! content hashes (BLAKE3) of the files a cached result depends on.
//!
//! Nothing here knows about models, maps or windows; every other module may use it.

use crate::error::{Error, Result};
use candle_core::Tensor;
use std::collections::HashMap;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;

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

/// The ending of every figure Mullion saves.
pub const FIGURE_SUFFIX: &str = ".figure.png";

/// The one name of a figure of `image` with map `map_id`: `<stem>.<map>.figure.png` (a `:` in
/// the map id becomes `-`). The window, the report and the comparison all name figures so.
pub fn figure_file_name(image: &Path, map_id: &str) -> String {
    let stem = image
        .file_stem()
        .map_or_else(|| "image".into(), |s| s.to_string_lossy().into_owned());
    format!("{stem}.{}{FIGURE_SUFFIX}", map_id.replace(':', "-"))
}

/// Whether `path` is a figure Mullion saved (so it is not listed as an input image).
pub fn is_own_output(path: &Path) -> bool {
    path.file_name().is_some_and(|n| {
        n.to_string_lossy()
            .to_ascii_lowercase()
            .ends_with(FIGURE_SUFFIX)
    })
}

/// Figures are written as PNG only: refuse any other ending before any work is done.
pub fn check_png_path(path: &Path) -> Result<()> {
    if has_extension(path, &["png"]) {
        Ok(())
    } else {
        Err(Error::BadArgument(format!(
            "{}: figures are saved as PNG; give a file name ending in .png",
            path.display()
        )))
    }
}

/// Image files directly inside `dir` (sub-folders are not searched), sorted by name; figures
/// Mullion saved there are left out.
pub fn list_images(dir: &Path) -> Result<Vec<PathBuf>> {
    let rd = std::fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
    let mut out: Vec<PathBuf> = rd
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_file() && is_image_path(p) && !is_own_output(p))
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

/// What kind of thing a file system entry is, in words, for messages.
fn kind_of(meta: &std::fs::Metadata) -> &'static str {
    use std::os::unix::fs::FileTypeExt;
    let t = meta.file_type();
    if t.is_symlink() {
        "a symbolic link"
    } else if t.is_dir() {
        "a folder"
    } else if t.is_fifo() {
        "a FIFO (named pipe)"
    } else if t.is_char_device() || t.is_block_device() {
        "a device node"
    } else if t.is_socket() {
        "a socket"
    } else if t.is_file() {
        "a regular file"
    } else {
        "not a regular file"
    }
}

/// Refuse to write over `path` unless it is absent or a regular file: renaming over a symbolic
/// link, a FIFO or a device node would silently replace it with a regular file.
pub fn check_writable_target(path: &Path) -> Result<()> {
    match std::fs::symlink_metadata(path) {
        Ok(m) if m.file_type().is_file() => Ok(()),
        Ok(m) => Err(Error::BadArgument(format!(
            "{}: is {}; Mullion writes its outputs only as new or regular files, so it is left \
             untouched (give another output name)",
            path.display(),
            kind_of(&m)
        ))),
        Err(_) => Ok(()),
    }
}

/// Identity of a file system entry: its canonical path, and (device, inode) when it exists, so
/// two names for one file (hard links, `a/../a`) are seen as the same.
#[derive(Clone, Debug, PartialEq, Eq)]
struct FileId {
    canonical: PathBuf,
    inode: Option<(u64, u64)>,
}

impl FileId {
    fn of(path: &Path) -> FileId {
        use std::os::unix::fs::MetadataExt;
        let inode = std::fs::metadata(path).ok().map(|m| (m.dev(), m.ino()));
        let canonical = std::fs::canonicalize(path).unwrap_or_else(|_| {
            // Not there yet: the canonical folder it would land in, and its name.
            let dir = std::fs::canonicalize(parent_dir(path))
                .unwrap_or_else(|_| parent_dir(path).to_path_buf());
            match path.file_name() {
                Some(n) => dir.join(n),
                None => dir,
            }
        });
        FileId { canonical, inode }
    }

    fn same(&self, other: &FileId) -> bool {
        self.canonical == other.canonical
            || matches!((self.inode, other.inode), (Some(a), Some(b)) if a == b)
    }
}

/// Check a run's outputs before it starts: no output may be one of its inputs or another of its
/// outputs (compared by canonical path and by inode), and each must be absent or a regular
/// file. `inputs` and `outputs` pair the argument's name with its path. A clash is bad usage.
pub fn check_outputs(inputs: &[(&str, &Path)], outputs: &[(&str, &Path)]) -> Result<()> {
    let ins: Vec<(&str, &Path, FileId)> = inputs
        .iter()
        .map(|(a, p)| (*a, *p, FileId::of(p)))
        .collect();
    let mut seen: Vec<(&str, &Path, FileId)> = Vec::new();
    for (arg, path) in outputs {
        check_writable_target(path)?;
        let id = FileId::of(path);
        if let Some((iarg, ipath, _)) = ins.iter().find(|i| i.2.same(&id)) {
            return Err(Error::BadArgument(format!(
                "{arg} {}: is the same file as {iarg} {}; writing it would destroy an input \
                 of this run (give another output name)",
                path.display(),
                ipath.display()
            )));
        }
        if let Some((oarg, opath, _)) = seen.iter().find(|o| o.2.same(&id)) {
            return Err(Error::BadArgument(format!(
                "{arg} {}: is the same file as {oarg} {}; one output would overwrite the other \
                 (give them different names)",
                path.display(),
                opath.display()
            )));
        }
        seen.push((arg, path, id));
    }
    Ok(())
}

/// Name of the lock file a run keeps in the output folder it writes.
pub const LOCK_NAME: &str = ".mullion.lock";

/// An exclusive operating-system lock on an output folder, held until dropped (or until the
/// process ends, however it ends: the kernel releases it, so a killed run leaves no stale lock).
#[derive(Debug)]
pub struct FolderLock {
    _file: std::fs::File,
    pub path: PathBuf,
}

/// Create `dir` if needed and take the exclusive lock on it, or fail at once with a message
/// naming the folder when another run holds it. The lock file stays in the folder (removing it
/// would let a third run lock a fresh file while the second still holds the old one).
pub fn lock_folder(dir: &Path) -> Result<FolderLock> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let path = dir.join(LOCK_NAME);
    check_writable_target(&path)?;
    let file = std::fs::OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .open(&path)
        .map_err(|e| Error::io(&path, e))?;
    match file.try_lock() {
        Ok(()) => Ok(FolderLock { _file: file, path }),
        Err(std::fs::TryLockError::WouldBlock) => Err(Error::bad_file(
            dir,
            format!(
                "another Mullion run is writing to this folder (it holds the lock {}); wait \
                 for it to finish or choose another output folder",
                path.display()
            ),
        )),
        Err(std::fs::TryLockError::Error(e)) => Err(Error::bad_file(
            &path,
            format!("cannot lock the output folder: {e}"),
        )),
    }
}

/// Read a small file whole, refusing anything that is not a regular file (a FIFO would block
/// the read for ever, a device could stream without end) or is larger than `max_bytes`.
/// `Ok(None)` when there is no file.
pub fn read_regular(path: &Path, max_bytes: u64) -> Result<Option<Vec<u8>>> {
    let meta = match std::fs::metadata(path) {
        Ok(m) => m,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(Error::io(path, e)),
    };
    if !meta.is_file() {
        return Err(Error::bad_file(
            path,
            format!(
                "is {}, not a regular file; it is left untouched",
                kind_of(&meta)
            ),
        ));
    }
    if meta.len() > max_bytes {
        return Err(Error::bad_file(
            path,
            format!(
                "is {} bytes, more than the {max_bytes} bytes Mullion reads for this kind of file",
                meta.len()
            ),
        ));
    }
    let file = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    // The bound holds even if the file grows between the check and the read.
    file.take(max_bytes + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| Error::io(path, e))?;
    if bytes.len() as u64 > max_bytes {
        return Err(Error::bad_file(
            path,
            format!("grew past {max_bytes} bytes while being read"),
        ));
    }
    Ok(Some(bytes))
}

/// BLAKE3 of a file's bytes as 64 hex digits. Refuses what is not a regular file.
pub fn hash_file(path: &Path) -> Result<String> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if !meta.is_file() {
        return Err(Error::bad_file(
            path,
            format!("is {}, not a regular file", kind_of(&meta)),
        ));
    }
    let file = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut hasher = blake3::Hasher::new();
    hasher.update_reader(file).map_err(|e| Error::io(path, e))?;
    Ok(hasher.finalize().to_hex().to_string())
}

/// BLAKE3 of bytes in memory, as 64 hex digits.
pub fn hash_bytes(bytes: &[u8]) -> String {
    blake3::hash(bytes).to_hex().to_string()
}

/// The first 64 bits of the BLAKE3 hash of `bytes` (little-endian): a stable, well-mixed number
/// for splitting work deterministically.
pub fn hash_u64(bytes: &[u8]) -> u64 {
    let h = blake3::hash(bytes);
    let mut first = [0u8; 8];
    first.copy_from_slice(&h.as_bytes()[..8]);
    u64::from_le_bytes(first)
}

/// Content hashes of files, each computed once per run: a run that keys several results on one
/// checkpoint reads it once. Entries are keyed by the canonical path and remembered with the
/// size, modification time and inode seen when hashing, so a file replaced during the run is
/// hashed again. Nothing is kept between runs: a new run always reads the bytes, so a file
/// replaced by another of the same size and time stamp is never mistaken for the old one.
#[derive(Default)]
pub struct ContentHashes {
    seen: Mutex<HashMap<PathBuf, (Stamp, String)>>,
}

/// What is compared to notice a file changed during one run.
#[derive(Clone, Debug, PartialEq, Eq)]
struct Stamp {
    len: u64,
    modified: Option<std::time::SystemTime>,
    changed: (i64, i64),
    inode: (u64, u64),
}

impl Stamp {
    fn of(path: &Path) -> Result<Stamp> {
        use std::os::unix::fs::MetadataExt;
        let m = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
        Ok(Stamp {
            len: m.len(),
            modified: m.modified().ok(),
            changed: (m.ctime(), m.ctime_nsec()),
            inode: (m.dev(), m.ino()),
        })
    }
}

impl ContentHashes {
    /// The BLAKE3 hex digest of the file at `path`.
    pub fn hash(&self, path: &Path) -> Result<String> {
        let key = std::fs::canonicalize(path).map_err(|e| Error::io(path, e))?;
        let stamp = Stamp::of(&key)?;
        if let Ok(seen) = self.seen.lock() {
            if let Some((s, h)) = seen.get(&key) {
                if *s == stamp {
                    return Ok(h.clone());
                }
            }
        }
        let h = hash_file(&key)?;
        if let Ok(mut seen) = self.seen.lock() {
            seen.insert(key, (stamp, h.clone()));
        }
        Ok(h)
    }
}

/// Run `write` on a temporary path next to `path`, then rename it over `path`, so a reader never
/// sees a half-written file. The temporary file is removed on failure. A target that exists and
/// is not a regular file (a symbolic link, FIFO, device node or folder) is refused.
pub fn write_atomic(path: &Path, write: impl FnOnce(&Path) -> Result<()>) -> Result<()> {
    check_writable_target(path)?;
    let dir = parent_dir(path);
    if !dir.is_dir() {
        return Err(Error::bad_file(
            path,
            format!("the folder {} does not exist", dir.display()),
        ));
    }
    let tmp = temp_path(path)?;
    // Probe first so an unwritable folder gives a plain message naming the target.
    std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&tmp)
        .map_err(|e| {
            Error::bad_file(
                path,
                format!("cannot write in the folder {}: {e}", dir.display()),
            )
        })?;
    let result = write(&tmp)
        .and_then(|()| usual_mode(&tmp))
        .and_then(|()| std::fs::rename(&tmp, path).map_err(|e| Error::io(path, e)));
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// Give a finished output the usual mode for a file others may read (0644 on Unix), whatever
/// the library that wrote it chose (some write their files private).
fn usual_mode(tmp: &Path) -> Result<()> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(tmp, std::fs::Permissions::from_mode(0o644))
            .map_err(|e| Error::io(tmp, e))?;
    }
    Ok(())
}

/// Write `text` to `path` atomically.
pub fn write_text_atomic(path: &Path, text: &str) -> Result<()> {
    write_atomic(path, |tmp| {
        std::fs::write(tmp, text.as_bytes()).map_err(|e| Error::io(path, e))
    })
}

/// Save an image as PNG atomically (the path must end in `.png`).
pub fn save_png_atomic(img: &image::RgbaImage, path: &Path) -> Result<()> {
    check_png_path(path)?;
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

    #[cfg(unix)]
    #[test]
    fn outputs_get_the_usual_mode() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("t.bin");
        write_atomic(&p, |tmp| {
            std::fs::write(tmp, b"x").map_err(|e| Error::io(tmp, e))?;
            // A writer that makes its file private, as some libraries do.
            std::fs::set_permissions(tmp, std::fs::Permissions::from_mode(0o600))
                .map_err(|e| Error::io(tmp, e))
        })
        .unwrap();
        let mode = std::fs::metadata(&p).unwrap().permissions().mode() & 0o777;
        assert_eq!(mode, 0o644);
    }

    #[test]
    fn figures_have_one_name_and_are_not_inputs() {
        let name = figure_file_name(Path::new("trays/a.b.png"), "channel:4");
        assert_eq!(name, "a.b.channel-4.figure.png");
        assert!(is_own_output(Path::new(&name)));
        assert!(!is_own_output(Path::new("a.png")));
        assert!(check_png_path(Path::new("x.jpg")).is_err());
        assert!(check_png_path(Path::new("x.PNG")).is_ok());
    }

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
