//! The scalar map kinds (token norm, one channel), the channel ranking, and the parser that
//! turns a command-line name (`norm`, `channel:N`, `pca`) into a kind.

use super::map::{stage_tokens, Map, MapKind, Tokens};
use super::pca::Pca;
use crate::engine::StageOutputs;
use crate::error::{Error, Result};

/// Per token, the Euclidean length of its channel vector: how strongly the stage responds there,
/// whatever the direction. The default map.
#[derive(Clone, Copy, Debug, Default)]
pub struct TokenNorm;

impl MapKind for TokenNorm {
    fn id(&self) -> String {
        "norm".into()
    }
    fn label(&self) -> String {
        "token L2 norm".into()
    }
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map> {
        Ok(token_norm(&stage_tokens(out, stage)?))
    }
}

/// The L2 norm map of a token matrix (accumulated in f64 so wide stages lose nothing).
pub fn token_norm(t: &Tokens) -> Map {
    let values = (0..t.len())
        .map(|i| {
            t.token(i)
                .iter()
                .map(|&v| (v as f64) * (v as f64))
                .sum::<f64>()
                .sqrt() as f32
        })
        .collect();
    Map::Scalar {
        rows: t.rows,
        cols: t.cols,
        values,
    }
}

/// The raw value of one channel at every token.
#[derive(Clone, Copy, Debug)]
pub struct Channel(pub usize);

impl MapKind for Channel {
    fn id(&self) -> String {
        format!("channel:{}", self.0)
    }
    fn label(&self) -> String {
        format!("channel {}", self.0)
    }
    fn compute(&self, out: &StageOutputs, stage: usize) -> Result<Map> {
        let t = stage_tokens(out, stage)?;
        if self.0 >= t.channels {
            return Err(Error::BadArgument(format!(
                "channel {} does not exist at stage {stage}, which has channels 0 to {}",
                self.0,
                t.channels - 1
            )));
        }
        Ok(Map::Scalar {
            rows: t.rows,
            cols: t.cols,
            values: (0..t.len()).map(|i| t.token(i)[self.0]).collect(),
        })
    }
}

/// Channels of `stage` ranked by their mean raw value over the stage's tokens, largest first
/// (signed mean, not mean magnitude: a channel that is strongly negative everywhere ranks last).
/// Ties keep the lower channel index first.
pub fn rank_channels(out: &StageOutputs, stage: usize) -> Result<Vec<(usize, f32)>> {
    Ok(rank_token_channels(&stage_tokens(out, stage)?))
}

/// [`rank_channels`] on a token matrix.
pub fn rank_token_channels(t: &Tokens) -> Vec<(usize, f32)> {
    let mut sums = vec![0f64; t.channels];
    for i in 0..t.len() {
        for (s, &v) in sums.iter_mut().zip(t.token(i)) {
            *s += v as f64;
        }
    }
    let n = t.len().max(1) as f64;
    let mut ranked: Vec<(usize, f32)> = sums
        .iter()
        .enumerate()
        .map(|(c, s)| (c, (s / n) as f32))
        .collect();
    // A stable sort keeps index order among equal means.
    ranked.sort_by(|a, b| b.1.total_cmp(&a.1));
    ranked
}

/// A map kind from its command-line name: `norm`, `channel:N`, `pca` or `difference` (which
/// needs a second checkpoint).
pub fn parse_map_kind(s: &str) -> Result<Box<dyn MapKind>> {
    let s = s.trim();
    match s {
        "norm" => Ok(Box::new(TokenNorm)),
        "pca" => Ok(Box::new(Pca)),
        "difference" => Ok(Box::new(super::compare::TokenDifference)),
        _ if super::padding::parse_padding_kind(s).is_some() => {
            super::padding::parse_padding_kind(s).expect("checked")
        }
        _ => match s.strip_prefix("channel:") {
            Some(n) => n
                .trim()
                .parse::<usize>()
                .map(|n| Box::new(Channel(n)) as Box<dyn MapKind>)
                .map_err(|_| {
                    Error::BadArgument(format!("map '{s}': the channel must be a whole number"))
                }),
            None => Err(Error::BadArgument(format!(
                "map '{s}': expected norm, channel:N or pca (or difference, which compares two checkpoints, or the padding studies padding:P, pad-order, pad-attention:B)"
            ))),
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tokens(rows: usize, cols: usize, channels: usize, data: Vec<f32>) -> Tokens {
        Tokens::new(rows, cols, channels, data).unwrap()
    }

    #[test]
    fn norm_matches_hand_computation() {
        // (3, 4) -> 5; (0, 0) -> 0; (1, -2) -> sqrt(5); (-6, 8) -> 10.
        let t = tokens(2, 2, 2, vec![3., 4., 0., 0., 1., -2., -6., 8.]);
        let Map::Scalar { rows, cols, values } = token_norm(&t) else {
            panic!("scalar expected")
        };
        assert_eq!((rows, cols), (2, 2));
        assert_eq!(values, vec![5.0, 0.0, 5f32.sqrt(), 10.0]);
    }

    #[test]
    fn channels_rank_by_signed_mean() {
        // Means: channel 0 = 1.0, channel 1 = -3.0 (large magnitude, ranks last), channel 2 = 2.0,
        // channel 3 = 1.0 (ties with 0; the lower index comes first).
        let t = tokens(1, 2, 4, vec![0.5, -2.0, 1.0, 1.0, 1.5, -4.0, 3.0, 1.0]);
        let r = rank_token_channels(&t);
        let order: Vec<usize> = r.iter().map(|p| p.0).collect();
        assert_eq!(order, vec![2, 0, 3, 1]);
        assert_eq!(r[0].1, 2.0);
        assert_eq!(r[3].1, -3.0);
    }

    #[test]
    fn map_kinds_parse() {
        assert_eq!(parse_map_kind("norm").unwrap().id(), "norm");
        assert_eq!(parse_map_kind("channel:7").unwrap().id(), "channel:7");
        assert_eq!(parse_map_kind("pca").unwrap().id(), "pca");
        assert!(parse_map_kind("difference").unwrap().needs_pair());
        assert!(!parse_map_kind("norm").unwrap().needs_pair());
        assert!(parse_map_kind("channel:x").is_err());
        assert!(parse_map_kind("attention").is_err());
    }
}
