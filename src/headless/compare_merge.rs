//! Merging the shard folders of a split comparison (`mullion compare --shard K/N`) into the
//! folder one unsplit run writes: the image rows of `stages.csv` by image name, as their shard
//! wrote them, and the pooled rows recomputed from the shards' streaming sums added together
//! (never an average of the shards' pooled rows); `drift.csv` and `unmatched.txt`, which every
//! shard computes from the same two checkpoints, must agree and are copied.

use super::compare::{
    read_stage_rows, read_summary, write_stages, CompareSummary, Pool, StageRow, DRIFT_NAME,
    POOLED_IMAGE, POOLED_NAME, STAGES_NAME, SUMMARY_NAME, UNMATCHED_NAME,
};
use super::report::{check_shard_set, FailedImage};
use crate::error::{Error, Result};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// What a comparison merge wrote.
#[derive(Clone, Debug, PartialEq)]
pub struct CompareMergeOutcome {
    pub stages_csv: PathBuf,
    pub summary_path: PathBuf,
    pub summary: CompareSummary,
    pub rows: usize,
    pub shards: usize,
}

struct Part {
    dir: PathBuf,
    summary: CompareSummary,
    rows: Vec<StageRow>,
    pool: Pool,
    drift: Vec<u8>,
    unmatched: Vec<u8>,
}

const MAX_PART_BYTES: u64 = 4 << 30;

fn read_bytes(path: &Path) -> Result<Vec<u8>> {
    crate::io::read_regular(path, MAX_PART_BYTES)?
        .ok_or_else(|| Error::bad_file(path, "missing: is this a finished comparison shard?"))
}

fn read_part(dir: &Path) -> Result<Part> {
    let summary = read_summary(&dir.join(SUMMARY_NAME))?;
    if summary.shard.is_none() {
        return Err(Error::BadArgument(format!(
            "{}: not a shard folder (its summary.json was written without --shard)",
            dir.display()
        )));
    }
    let rows = read_stage_rows(&dir.join(STAGES_NAME))?
        .into_iter()
        .filter(|r| r.image != POOLED_IMAGE)
        .collect();
    Ok(Part {
        dir: dir.to_path_buf(),
        summary,
        rows,
        pool: Pool::load(&dir.join(POOLED_NAME))?,
        drift: read_bytes(&dir.join(DRIFT_NAME))?,
        unmatched: read_bytes(&dir.join(UNMATCHED_NAME))?,
    })
}

/// Merge the shard folders `dirs` of one split comparison (each shard once) into `out`.
pub fn merge_compares(dirs: &[PathBuf], out: &Path) -> Result<CompareMergeOutcome> {
    if dirs.is_empty() {
        return Err(Error::BadArgument("merge: give the shard folders".into()));
    }
    let parts = dirs
        .iter()
        .map(|d| read_part(d))
        .collect::<Result<Vec<_>>>()?;
    let shards: Vec<_> = parts
        .iter()
        .map(|p| {
            let s = p.summary.shard.clone().expect("checked in read_part");
            (p.dir.as_path(), s)
        })
        .collect();
    check_shard_set(&shards)?;
    // The drift and the unmatched list depend on the checkpoints only: every shard has the same.
    for p in &parts[1..] {
        for (name, mine, theirs) in [
            (DRIFT_NAME, &p.drift, &parts[0].drift),
            (UNMATCHED_NAME, &p.unmatched, &parts[0].unmatched),
        ] {
            if mine != theirs {
                return Err(Error::bad_file(
                    p.dir.join(name),
                    format!(
                        "differs from {}; the shards did not compare the same checkpoints",
                        parts[0].dir.join(name).display()
                    ),
                ));
            }
        }
    }
    let names = [
        STAGES_NAME,
        DRIFT_NAME,
        UNMATCHED_NAME,
        SUMMARY_NAME,
        POOLED_NAME,
    ];
    let paths = names.map(|n| out.join(n));
    let inputs: Vec<(String, PathBuf)> = parts
        .iter()
        .flat_map(|p| names.map(|n| (format!("a shard's {n}"), p.dir.join(n))))
        .collect();
    let input_refs: Vec<(&str, &Path)> = inputs
        .iter()
        .map(|(a, p)| (a.as_str(), p.as_path()))
        .collect();
    let output_refs: Vec<(&str, &Path)> = paths.iter().map(|p| ("--out", p.as_path())).collect();
    crate::io::check_outputs(&input_refs, &output_refs)?;
    let _lock = crate::io::lock_folder(out)?;

    let mut by_image: BTreeMap<String, (&Path, Vec<StageRow>)> = BTreeMap::new();
    for p in &parts {
        for r in &p.rows {
            let entry = by_image
                .entry(r.image.clone())
                .or_insert_with(|| (&p.dir, Vec::new()));
            if entry.0 != p.dir.as_path() {
                return Err(Error::bad_file(
                    &p.dir,
                    format!(
                        "image {} has rows here and in {}; shards must not overlap",
                        r.image,
                        entry.0.display()
                    ),
                ));
            }
            entry.1.push(r.clone());
        }
    }
    // Shards in index order, so the sums add up in one fixed order.
    let mut ordered: Vec<&Part> = parts.iter().collect();
    ordered.sort_by_key(|p| p.summary.shard.as_ref().map(|s| s.index));
    let mut pool = Pool::default();
    for p in &ordered {
        pool.merge(&p.pool)
            .map_err(|e| Error::bad_file(p.dir.join(POOLED_NAME), e.to_string()))?;
    }
    let image_rows: Vec<Vec<StageRow>> = by_image.into_values().map(|v| v.1).collect();
    let n_rows = write_stages(&paths[0], &image_rows, &pool.rows())?;
    crate::io::write_atomic(&paths[1], |tmp| {
        std::fs::write(tmp, &parts[0].drift).map_err(|e| Error::io(&paths[1], e))
    })?;
    crate::io::write_atomic(&paths[2], |tmp| {
        std::fs::write(tmp, &parts[0].unmatched).map_err(|e| Error::io(&paths[2], e))
    })?;
    pool.save(&paths[4])?;

    let mut failed: Vec<FailedImage> = parts
        .iter()
        .flat_map(|p| p.summary.failed.iter().cloned())
        .collect();
    failed.sort_by(|a, b| a.image.cmp(&b.image));
    let base = &parts[0].summary;
    let sum = |f: fn(&CompareSummary) -> usize| parts.iter().map(|p| f(&p.summary)).sum();
    let summary = CompareSummary {
        images: sum(|s| s.images),
        computed: sum(|s| s.computed),
        reused: sum(|s| s.reused),
        failed,
        shard: None,
        ..base.clone()
    };
    let mut text =
        serde_json::to_string_pretty(&summary).map_err(|e| Error::Internal(e.to_string()))?;
    text.push('\n');
    crate::io::write_text_atomic(&paths[3], &text)?;
    Ok(CompareMergeOutcome {
        stages_csv: paths[0].clone(),
        summary_path: paths[3].clone(),
        summary,
        rows: n_rows,
        shards: parts.len(),
    })
}
