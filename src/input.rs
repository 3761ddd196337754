//! From an image file to the network input: decode (orientation applied, RGB), check sizes, and
//! normalise `x = (u8 / 255 - mean) / std` into a `[3, H, W]` f32 tensor at the image's own size.

use crate::error::{Error, Result};
use candle_core::{Device, Tensor};
use image::{ImageDecoder, ImageReader, RgbImage};
use std::path::Path;

/// Largest image side Mullion decodes (pixels).
pub const MAX_SIDE: u32 = 16384;

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
    fn triples_parse_and_reject() {
        assert_eq!(parse_triple("0.5, 0.5,0.5").unwrap(), [0.5; 3]);
        assert!(parse_triple("1,2").is_err());
        assert!(parse_triple("a,b,c").is_err());
    }
}
