//! Merging the shard folders of a split report (`mullion report --shard K/N`) into the
//! `regions.csv` and `summary.json` one unsplit run gives: the same rows, byte for byte, in the
//! same order (images sorted by name, each image's rows as its shard wrote them), and the
//! summary's per-label statistics recomputed from those rows in that order, so they are the
//! same numbers too. [`merge_shards`] tells a report's shards from a comparison's (by the
//! schema of their `summary.json`) and merges either.

use super::compare_merge::{merge_compares, CompareMergeOutcome};
use super::report::{
    check_shard_set, read_summary, FailedImage, Groups, ReportRow, Summary, CSV_NAME, SUMMARY_NAME,
};
use crate::error::{Error, Result};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// What a merge wrote.
#[derive(Clone, Debug, PartialEq)]
pub struct MergeOutcome {
    pub csv: PathBuf,
    pub summary_path: PathBuf,
    pub summary: Summary,
    pub rows: usize,
    pub shards: usize,
}

/// One shard folder, read.
struct ShardRead {
    dir: PathBuf,
    summary: Summary,
    /// Rows grouped by image, in the shard's order.
    rows: Vec<(String, Vec<csv::StringRecord>)>,
}

/// Largest `regions.csv` or `summary.json` a merge reads (bytes).
const MAX_PART_BYTES: u64 = 4 << 30;

fn read_part(dir: &Path) -> Result<ShardRead> {
    let summary = read_summary(&dir.join(SUMMARY_NAME))?;
    let csv_path = dir.join(CSV_NAME);
    let bytes = crate::io::read_regular(&csv_path, MAX_PART_BYTES)?
        .ok_or_else(|| Error::bad_file(&csv_path, "missing: is this a finished shard folder?"))?;
    let mut reader = csv::ReaderBuilder::new().from_reader(bytes.as_slice());
    let header: Vec<String> = reader
        .headers()
        .map_err(|e| Error::bad_file(&csv_path, format!("not a region table: {e}")))?
        .iter()
        .map(String::from)
        .collect();
    if header != crate::analysis::region_stats::CSV_COLUMNS {
        return Err(Error::bad_file(
            &csv_path,
            format!("not a region table of this Mullion: columns {header:?}"),
        ));
    }
    let mut rows: Vec<(String, Vec<csv::StringRecord>)> = Vec::new();
    for (i, rec) in reader.records().enumerate() {
        let rec = rec.map_err(|e| Error::bad_file(&csv_path, format!("row {}: {e}", i + 1)))?;
        let image = rec.get(0).unwrap_or_default().to_string();
        match rows.last_mut() {
            Some((last, v)) if *last == image => v.push(rec),
            _ => rows.push((image, vec![rec])),
        }
    }
    Ok(ShardRead {
        dir: dir.to_path_buf(),
        summary,
        rows,
    })
}

/// The image a warning (`"<image>: <note>"`) is about: the longest of `names` it starts with.
fn warning_image<'a>(warning: &str, names: &'a [String]) -> Option<&'a str> {
    names
        .iter()
        .filter(|n| {
            warning
                .strip_prefix(n.as_str())
                .is_some_and(|r| r.starts_with(": "))
        })
        .max_by_key(|n| n.len())
        .map(String::as_str)
}

/// What [`merge_shards`] merged.
#[derive(Clone, Debug, PartialEq)]
pub enum Merged {
    Report(MergeOutcome),
    Compare(CompareMergeOutcome),
}

/// Merge the shard folders of a split report or of a split comparison, whichever they are (the
/// first folder's `summary.json` says).
pub fn merge_shards(dirs: &[PathBuf], out: &Path) -> Result<Merged> {
    let Some(first) = dirs.first() else {
        return Err(Error::BadArgument("merge: give the shard folders".into()));
    };
    let path = first.join(SUMMARY_NAME);
    let bytes = crate::io::read_regular(&path, MAX_PART_BYTES)?
        .ok_or_else(|| Error::bad_file(&path, "missing: is this a finished shard folder?"))?;
    let schema = serde_json::from_slice::<serde_json::Value>(&bytes)
        .ok()
        .and_then(|v| v.get("schema").and_then(|s| s.as_str()).map(String::from));
    if schema.as_deref() == Some(super::compare::SUMMARY_SCHEMA) {
        Ok(Merged::Compare(merge_compares(dirs, out)?))
    } else {
        Ok(Merged::Report(merge_reports(dirs, out)?))
    }
}

/// Merge the shard folders `dirs` (every shard of one split run, each once) into `out`.
pub fn merge_reports(dirs: &[PathBuf], out: &Path) -> Result<MergeOutcome> {
    if dirs.is_empty() {
        return Err(Error::BadArgument("merge: give the shard folders".into()));
    }
    let parts = dirs
        .iter()
        .map(|d| read_part(d))
        .collect::<Result<Vec<_>>>()?;
    let info = |p: &ShardRead| {
        p.summary.shard.clone().ok_or_else(|| {
            Error::BadArgument(format!(
                "{}: not a shard folder (its summary.json was written without --shard)",
                p.dir.display()
            ))
        })
    };
    let shards = parts
        .iter()
        .map(|p| Ok((p.dir.as_path(), info(p)?)))
        .collect::<Result<Vec<_>>>()?;
    if let Some(p) = parts.iter().find(|p| p.summary.map != parts[0].summary.map) {
        return Err(Error::BadArgument(format!(
            "{} measured map {} but {} map {}; merge only shards of one run",
            p.dir.display(),
            p.summary.map,
            parts[0].dir.display(),
            parts[0].summary.map
        )));
    }
    check_shard_set(&shards)?;

    let csv_path = out.join(CSV_NAME);
    let summary_path = out.join(SUMMARY_NAME);
    let inputs: Vec<(String, PathBuf)> = parts
        .iter()
        .flat_map(|p| {
            [
                ("a shard's regions.csv".to_string(), p.dir.join(CSV_NAME)),
                (
                    "a shard's summary.json".to_string(),
                    p.dir.join(SUMMARY_NAME),
                ),
            ]
        })
        .collect();
    let input_refs: Vec<(&str, &Path)> = inputs
        .iter()
        .map(|(a, p)| (a.as_str(), p.as_path()))
        .collect();
    crate::io::check_outputs(
        &input_refs,
        &[
            ("--out", csv_path.as_path()),
            ("--out", summary_path.as_path()),
        ],
    )?;
    let _lock = crate::io::lock_folder(out)?;

    // Rows by image name: the order a single run gives (it lists a folder sorted by name).
    let mut by_image: BTreeMap<String, (&Path, &Vec<csv::StringRecord>)> = BTreeMap::new();
    for p in &parts {
        for (image, recs) in &p.rows {
            if let Some((other, _)) = by_image.insert(image.clone(), (&p.dir, recs)) {
                return Err(Error::bad_file(
                    &p.dir,
                    format!(
                        "image {image} has rows here and in {}; shards must not overlap",
                        other.display()
                    ),
                ));
            }
        }
    }
    let headers = csv::StringRecord::from(crate::analysis::region_stats::CSV_COLUMNS.to_vec());
    let mut groups = Groups::default();
    let mut n_rows = 0usize;
    crate::io::write_atomic(&csv_path, |tmp| {
        let csv_err = |e: csv::Error| Error::bad_file(&csv_path, format!("cannot write: {e}"));
        let mut w = csv::WriterBuilder::new()
            .has_headers(false)
            .from_path(tmp)
            .map_err(csv_err)?;
        w.write_record(&headers).map_err(csv_err)?;
        for (dir, recs) in by_image.values() {
            for rec in recs.iter() {
                let row: ReportRow = rec.deserialize(Some(&headers)).map_err(|e| {
                    Error::bad_file(dir.join(CSV_NAME), format!("not a region row: {e}"))
                })?;
                groups.push(&row);
                w.write_record(rec).map_err(csv_err)?;
                n_rows += 1;
            }
        }
        w.flush().map_err(|e| Error::io(&csv_path, e))
    })?;

    let mut failed: Vec<FailedImage> = Vec::new();
    let mut without_regions: Vec<String> = Vec::new();
    let mut warnings: Vec<(String, usize, String)> = Vec::new();
    let (mut images, mut computed, mut reused) = (0, 0, 0);
    for (shard_no, p) in parts.iter().enumerate() {
        let s = &p.summary;
        images += s.images;
        computed += s.computed;
        reused += s.reused;
        failed.extend(s.failed.iter().cloned());
        without_regions.extend(s.without_regions.iter().cloned());
        let mut names: Vec<String> = p.rows.iter().map(|(n, _)| n.clone()).collect();
        names.extend(s.failed.iter().map(|f| f.image.clone()));
        names.extend(s.without_regions.iter().cloned());
        for (i, w) in s.warnings.iter().enumerate() {
            let image = warning_image(w, &names).unwrap_or_default().to_string();
            // Within an image, keep the shard's order (shard number, then position).
            warnings.push((image, shard_no * 1_000_000_000 + i, w.clone()));
        }
    }
    failed.sort_by(|a, b| a.image.cmp(&b.image));
    without_regions.sort();
    warnings.sort();
    let base = &parts[0].summary;
    let summary = Summary {
        schema: base.schema.clone(),
        version: base.version,
        caution: base.caution.clone(),
        map: base.map.clone(),
        checkpoint: base.checkpoint.clone(),
        images,
        computed,
        reused,
        groups: groups.finish(),
        failed,
        without_regions,
        warnings: warnings.into_iter().map(|w| w.2).collect(),
        shard: None,
    };
    let mut text =
        serde_json::to_string_pretty(&summary).map_err(|e| Error::Internal(e.to_string()))?;
    text.push('\n');
    crate::io::write_text_atomic(&summary_path, &text)?;
    Ok(MergeOutcome {
        csv: csv_path,
        summary_path,
        summary,
        rows: n_rows,
        shards: parts.len(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn warnings_go_to_the_longest_matching_image() {
        let names = vec!["a.png".to_string(), "a.png: b.png".to_string()];
        assert_eq!(warning_image("a.png: clipped", &names), Some("a.png"));
        assert_eq!(
            warning_image("a.png: b.png: clipped", &names),
            Some("a.png: b.png")
        );
        assert_eq!(warning_image("c.png: x", &names), None);
    }
}
