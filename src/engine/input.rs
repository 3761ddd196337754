//! From an image file to the network input: decode (orientation applied, RGB), check sizes, and
//! normalise `x = (u8 / 255 - mean) / std` into a `[3, H, W]` f32 tensor at the image's own size.

use crate::error::{Error, Result};
use candle_core::{Device, Tensor};
use image::{ImageDecoder, ImageReader, Limits, RgbImage};
use std::path::Path;

/// Largest image side Mullion decodes (pixels).
pub const MAX_SIDE: u32 = 16384;

/// Forward passes estimated to need more memory than this are refused unless the user raises
/// the limit (`--max-memory-gb`), in bytes.
pub const DEFAULT_MEMORY_LIMIT: u64 = 12_000_000_000;
/// [`DEFAULT_MEMORY_LIMIT`] in GB, as the command line spells it.
pub const DEFAULT_MEMORY_GB: f64 = DEFAULT_MEMORY_LIMIT as f64 / 1e9;

/// A memory limit given in GB, in bytes; `None` unless positive and finite.
pub fn memory_limit_from_gb(gb: f64) -> Option<u64> {
    (gb.is_finite() && gb > 0.0).then_some((gb * 1e9) as u64)
}

/// Per-channel normalisation of the network input.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Normalisation {
    pub mean: [f32; 3],
    pub std: [f32; 3],
}

impl Normalisation {
    /// ImageNet statistics, the common default of both reference libraries.
    pub const IMAGENET: Normalisation = Normalisation {
        mean: [0.485, 0.456, 0.406],
        std: [0.229, 0.224, 0.225],
    };
    /// Mean 0.5, std 0.5 (inputs in [-1, 1]).
    pub const HALF: Normalisation = Normalisation {
        mean: [0.5; 3],
        std: [0.5; 3],
    };

    pub fn validate(&self) -> Result<()> {
        if self
            .std
            .iter()
            .any(|&s| !(s.is_finite() && s.is_sign_positive() && s != 0.0))
            || self.mean.iter().any(|m| !m.is_finite())
        {
            return Err(Error::BadArgument(format!(
                "normalisation std must be positive and finite (got mean {:?}, std {:?})",
                self.mean, self.std
            )));
        }
        Ok(())
    }
}

impl Default for Normalisation {
    fn default() -> Self {
        Self::IMAGENET
    }
}

/// How an image becomes the network input.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
pub enum InputPolicy {
    /// The image at its own size (the default: what the user really feeds).
    Native,
    /// Resize so the long side is N pixels, keeping the aspect ratio.
    FitLongSide(u32),
    /// Resize to N x N.
    Square(u32),
}

impl InputPolicy {
    /// Target (width, height) for an image of (w, h).
    pub fn target(self, w: u32, h: u32) -> (u32, u32) {
        match self {
            InputPolicy::Native => (w, h),
            InputPolicy::FitLongSide(n) => {
                let s = n as f64 / w.max(h) as f64;
                (
                    ((w as f64 * s).round() as u32).max(1),
                    ((h as f64 * s).round() as u32).max(1),
                )
            }
            InputPolicy::Square(n) => (n, n),
        }
    }

    pub fn describe(self) -> String {
        match self {
            InputPolicy::Native => "native size".into(),
            InputPolicy::FitLongSide(n) => format!("long side {n}"),
            InputPolicy::Square(n) => format!("{n}x{n}"),
        }
    }
}

/// The network input for `img` under `policy`: the image itself at native size, otherwise a
/// triangle-filtered resize.
pub fn apply_policy(img: &RgbImage, policy: InputPolicy) -> RgbImage {
    let (w, h) = policy.target(img.width(), img.height());
    if (w, h) == img.dimensions() {
        img.clone()
    } else {
        image::imageops::resize(img, w, h, image::imageops::FilterType::Triangle)
    }
}

/// What an image file's header says, read before any pixel is decoded.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ImageHeader {
    /// Width and height as displayed (after the EXIF orientation).
    pub width: u32,
    pub height: u32,
    /// Bytes per pixel of the decoded buffer (3 for 8-bit RGB, 6 for 16-bit RGB, ...).
    pub bytes_per_pixel: u64,
    /// Whether the EXIF orientation asks for a flip or rotation (one more buffer while applied).
    pub reoriented: bool,
}

impl ImageHeader {
    /// Pixels of the image.
    pub fn pixels(&self) -> u64 {
        self.width as u64 * self.height as u64
    }

    /// Peak bytes while decoding to RGB and normalising: the decoded buffer (twice while a
    /// rotation is applied) and its 8-bit RGB copy, then that copy with the `[3, H, W]` f32
    /// input made from it.
    pub fn decode_peak_bytes(&self) -> Option<u64> {
        let px = self.pixels();
        let decoded = px.checked_mul(self.bytes_per_pixel)?;
        let decode = decoded
            .checked_mul(if self.reoriented { 2 } else { 1 })?
            .checked_add(px.checked_mul(3)?)?;
        let normalise = px.checked_mul(3 + 12)?;
        Some(decode.max(normalise))
    }
}

/// Decode an image file to RGB with its EXIF orientation applied.
pub fn load_image(path: impl AsRef<Path>) -> Result<RgbImage> {
    load_image_within(path, |_| Ok(()))
}

/// An image file opened up to its header.
struct Opened {
    decoder: Box<dyn image::ImageDecoder>,
    header: ImageHeader,
    orientation: Option<image::metadata::Orientation>,
    limits: Limits,
}

fn open_decoder(path: &Path) -> Result<Opened> {
    let bad = |m: String| Error::bad_file(path, m);
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if !meta.is_file() {
        return Err(bad("not a regular file".into()));
    }
    let mut reader = ImageReader::open(path)
        .map_err(|e| Error::io(path, e))?
        .with_guessed_format()
        .map_err(|e| Error::io(path, e))?;
    if reader.format().is_none() {
        return Err(bad(
            "not an image Mullion can read (PNG, JPEG, WebP, TIFF, BMP)".into(),
        ));
    }
    // Until the header is read: the largest buffer an image within the side limit can need.
    // The sides are checked below, with a message that gives them.
    let mut limits = Limits::default();
    limits.max_alloc = Some(MAX_SIDE as u64 * MAX_SIDE as u64 * 16);
    reader.limits(limits.clone());
    limits.max_image_width = Some(MAX_SIDE);
    limits.max_image_height = Some(MAX_SIDE);
    let mut decoder = reader.into_decoder().map_err(|e| match e {
        image::ImageError::Limits(_) => Error::Limit(format!(
            "{}: the image is larger than Mullion opens ({MAX_SIDE} pixels a side; resize it \
             first)",
            path.display()
        )),
        e => bad(format!("cannot decode: {e}")),
    })?;
    let (w, h) = decoder.dimensions();
    if w > MAX_SIDE || h > MAX_SIDE {
        return Err(Error::Limit(format!(
            "{}: the image is {w}x{h} pixels; Mullion opens images up to {MAX_SIDE} pixels a side \
             (resize it first)",
            path.display()
        )));
    }
    if w == 0 || h == 0 {
        return Err(bad("the image has no pixels".into()));
    }
    let orientation = decoder.orientation().ok();
    use image::metadata::Orientation as O;
    let swaps = matches!(
        orientation,
        Some(O::Rotate90 | O::Rotate270 | O::Rotate90FlipH | O::Rotate270FlipH)
    );
    let header = ImageHeader {
        width: if swaps { h } else { w },
        height: if swaps { w } else { h },
        bytes_per_pixel: decoder.color_type().bytes_per_pixel() as u64,
        reoriented: orientation.is_some_and(|o| o != O::NoTransforms),
    };
    Ok(Opened {
        decoder: Box::new(decoder),
        header,
        orientation,
        limits,
    })
}

/// What an image file's header says (size as displayed, pixel format), without decoding it.
pub fn read_header(path: impl AsRef<Path>) -> Result<ImageHeader> {
    Ok(open_decoder(path.as_ref())?.header)
}

/// [`load_image`] that first reads the header and lets `check` refuse the image (e.g. for the
/// memory its run would need) before a single pixel is decoded. The decoder is held to the
/// bytes the header announces (the image crate's `Limits`), so a file that lies in its header
/// cannot make it allocate more.
pub fn load_image_within(
    path: impl AsRef<Path>,
    check: impl FnOnce(&ImageHeader) -> Result<()>,
) -> Result<RgbImage> {
    let path = path.as_ref();
    let bad = |m: String| Error::bad_file(path, m);
    let Opened {
        mut decoder,
        header,
        orientation,
        mut limits,
    } = open_decoder(path)?;
    check(&header)?;
    let exact = decoder.total_bytes();
    limits.max_alloc = Some(exact.saturating_add(exact / 4).saturating_add(64 << 20));
    decoder
        .set_limits(limits)
        .map_err(|e| bad(format!("cannot decode: {e}")))?;
    let mut img = image::DynamicImage::from_decoder(decoder)
        .map_err(|e| bad(format!("cannot decode (truncated or corrupt?): {e}")))?;
    if let Some(o) = orientation {
        img.apply_orientation(o);
    }
    Ok(img.into_rgb8())
}

/// `[3, H, W]` f32: `(u8 / 255 - mean) / std` per channel, the image at its own size.
pub fn normalise(img: &RgbImage, norm: &Normalisation) -> Result<Tensor> {
    let (w, h) = img.dimensions();
    let (w, h) = (w as usize, h as usize);
    let mut data = vec![0f32; 3 * h * w];
    for (i, px) in img.pixels().enumerate() {
        for c in 0..3 {
            data[c * h * w + i] = (px[c] as f32 / 255.0 - norm.mean[c]) / norm.std[c];
        }
    }
    Ok(Tensor::from_vec(data, (3, h, w), &Device::Cpu)?)
}

/// Parse `R,G,B` into three floats.
pub fn parse_triple(s: &str) -> std::result::Result<[f32; 3], String> {
    let v: Vec<f32> = s
        .split(',')
        .map(|p| p.trim().parse::<f32>().map_err(|e| format!("'{p}': {e}")))
        .collect::<std::result::Result<_, _>>()?;
    v.try_into()
        .map_err(|v: Vec<f32>| format!("expected three numbers R,G,B, got {}", v.len()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normalise_matches_formula() {
        let mut img = RgbImage::new(2, 1);
        img.put_pixel(1, 0, image::Rgb([255, 0, 128]));
        let t = normalise(&img, &Normalisation::IMAGENET).unwrap();
        let v: Vec<f32> = t.flatten_all().unwrap().to_vec1().unwrap();
        // channel-major: R(0,0), R(0,1), G(0,0), G(0,1), B(0,0), B(0,1)
        assert!((v[1] - (1.0 - 0.485) / 0.229).abs() < 1e-6);
        assert!((v[3] - (0.0 - 0.456) / 0.224).abs() < 1e-6);
        assert!((v[5] - (128.0 / 255.0 - 0.406) / 0.225).abs() < 1e-6);
    }

    #[test]
    fn policies_keep_aspect() {
        assert_eq!(InputPolicy::Native.target(333, 250), (333, 250));
        assert_eq!(InputPolicy::FitLongSide(224).target(333, 250), (224, 168));
        assert_eq!(InputPolicy::Square(224).target(333, 250), (224, 224));
    }

    #[test]
    fn triples_parse_and_reject() {
        assert_eq!(parse_triple("0.5, 0.5,0.5").unwrap(), [0.5; 3]);
        assert!(parse_triple("1,2").is_err());
        assert!(parse_triple("a,b,c").is_err());
    }
}
