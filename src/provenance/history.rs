//! `cairn history`: the lock chain and the audit log, checked and shown.
//!
//! Each lock record is printed with who locked the plan, when and why, and
//! the change of the plan text since the record before it (a line diff).
//! The current plan file is compared with the newest record. The audit log's
//! chain is checked too; a broken lock chain or audit log is an error that
//! says where it breaks.

use super::{audit, lock, sha256_hex};
use crate::error::Error;
use std::path::Path;

/// The history as text, ready to print.
pub fn history(plan_path: &Path) -> Result<String, Error> {
    let mut text = String::new();
    let plan_bytes = std::fs::read(plan_path)
        .map_err(|cause| Error::io(&plan_path.display().to_string(), "read the plan", &cause))?;
    let plan_text = String::from_utf8_lossy(&plan_bytes).into_owned();
    match lock::read(plan_path)? {
        None => text.push_str("no lock record: the plan has never been locked\n"),
        Some(loaded) => {
            text.push_str(&format!(
                "lock chain in {}: {} record(s), chain intact\n",
                loaded.file_name,
                loaded.lock.records.len()
            ));
            let mut previous: Option<&str> = None;
            for record in &loaded.lock.records {
                text.push_str(&format!(
                    "\nrecord {} — locked {} by {} with cairn {}\n  reason: {}\n  plan SHA-256: {}\n",
                    record.sequence, record.locked_at, record.locked_by, record.tool_version, record.reason, record.plan_sha256
                ));
                for (file, hash) in &record.blinded_data_sha256 {
                    text.push_str(&format!("  blinded data {file}: {hash}\n"));
                }
                match previous {
                    None => text.push_str("  first version of the plan\n"),
                    Some(before) => {
                        text.push_str("  changes since the previous record:\n");
                        text.push_str(&indent(&line_diff(before, &record.plan_text)));
                    }
                }
                previous = Some(&record.plan_text);
            }
            if let Some(last) = loaded.lock.records.last() {
                if sha256_hex(&plan_bytes) == last.plan_sha256 {
                    text.push_str(&format!(
                        "\nthe plan file matches record {}\n",
                        last.sequence
                    ));
                } else {
                    text.push_str(&format!(
                        "\nthe plan file has changed since record {} (SHA-256 now {}):\n",
                        last.sequence,
                        sha256_hex(&plan_bytes)
                    ));
                    text.push_str(&indent(&line_diff(&last.plan_text, &plan_text)));
                }
            }
        }
    }
    let entries = audit::read(plan_path)?;
    if entries.is_empty() {
        text.push_str("\nno audit log\n");
    } else {
        text.push_str(&format!(
            "\naudit log: {} line(s), chain intact\n",
            entries.len()
        ));
        for entry in &entries {
            let manifest = entry
                .manifest_sha256
                .as_deref()
                .map(|hash| format!(", outputs manifest {hash}"))
                .unwrap_or_default();
            text.push_str(&format!(
                "  {} {} → {} (plan {}{manifest})\n",
                entry.time, entry.command, entry.outcome, entry.plan_sha256
            ));
        }
    }
    Ok(text)
}

fn indent(text: &str) -> String {
    text.lines().map(|line| format!("    {line}\n")).collect()
}

/// A line diff: unchanged lines are left out; removed lines start with "- "
/// and carry their line number in the older text, added lines start with "+ "
/// and carry their number in the newer text.
pub fn line_diff(before: &str, after: &str) -> String {
    let old: Vec<&str> = before.lines().collect();
    let new: Vec<&str> = after.lines().collect();
    const LIMIT: usize = 20_000;
    if old.len() * new.len() > LIMIT * LIMIT / 4 {
        return format!(
            "(the texts are too long to compare line by line: {} and {} lines)\n",
            old.len(),
            new.len()
        );
    }
    // Longest common subsequence table, filled from the end.
    let mut table = vec![vec![0u32; new.len() + 1]; old.len() + 1];
    for i in (0..old.len()).rev() {
        for j in (0..new.len()).rev() {
            table[i][j] = if old[i] == new[j] {
                table[i + 1][j + 1] + 1
            } else {
                table[i + 1][j].max(table[i][j + 1])
            };
        }
    }
    let (mut i, mut j) = (0, 0);
    let mut output = String::new();
    while i < old.len() || j < new.len() {
        if i < old.len() && j < new.len() && old[i] == new[j] {
            i += 1;
            j += 1;
        } else if j < new.len() && (i == old.len() || table[i][j + 1] > table[i + 1][j]) {
            output.push_str(&format!("+ {:>4} | {}\n", j + 1, new[j]));
            j += 1;
        } else {
            output.push_str(&format!("- {:>4} | {}\n", i + 1, old[i]));
            i += 1;
        }
    }
    if output.is_empty() {
        output.push_str("(no change in the text)\n");
    }
    output
}

#[cfg(test)]
mod tests {
    use super::line_diff;

    #[test]
    fn diff_shows_only_changed_lines() {
        let diff = line_diff("a\nb\nc\n", "a\nB\nc\nd\n");
        assert_eq!(diff, "-    2 | b\n+    2 | B\n+    4 | d\n");
        assert_eq!(line_diff("x\n", "x\n"), "(no change in the text)\n");
    }
}
