//! From an image file to the network input: decode (orientation applied, RGB), check sizes, and
//! normalise `x = (u8 / 255 - mean) / std` into a `[3, H, W]` f32 tensor at the image's own size.

use crate::error::{Error, Result};
use candle_core::{Device, Tensor};
use image::{ImageDecoder, ImageReader, RgbImage};
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
        if self.std.iter().any(|&s| !(s > 0.0) || !s.is_finite())
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

/// Decode an image file to RGB with its EXIF orientation applied.
pub fn load_image(path: impl AsRef<Path>) -> Result<RgbImage> {
    let path = path.as_ref();
    let bad = |m: String| Error::bad_file(path, m);
    let reader = ImageReader::open(path)
        .map_err(|e| Error::io(path, e))?
        .with_guessed_format()
        .map_err(|e| Error::io(path, e))?;
    if reader.format().is_none() {
        return Err(bad(
            "not an image Mullion can read (PNG, JPEG, WebP, TIFF, BMP)".into(),
        ));
    }
    let mut decoder = reader
        .into_decoder()
        .map_err(|e| bad(format!("cannot decode: {e}")))?;
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
    let mut img = image::DynamicImage::from_decoder(decoder)
        .map_err(|e| bad(format!("cannot decode (truncated or corrupt?): {e}")))?;
    if let Some(o) = orientation {
        img.apply_orientation(o);
    }
    Ok(img.to_rgb8())
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
