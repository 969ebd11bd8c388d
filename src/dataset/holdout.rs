//! The locked holdout's rows: chosen once by their own seeded stream (`purpose::HOLDOUT`,
//! stratified by class when classifying) and never touched by the decomposition; their hash
//! identifies them in the assessment ledger (`lossprism run SCENARIO --assess VALUE`).

use rand::Rng;

use super::Table;
use crate::family::Task;
use crate::rng::{purpose, stream};

/// Chooses `round(fraction · n)` holdout rows (per class, `round(fraction · n_c)`) with the
/// stream `(seed, HOLDOUT, 0)`; returns them sorted. `fraction = 0` gives none.
pub fn choose(table: &Table, fraction: f64, seed: u64) -> Vec<usize> {
    if fraction <= 0.0 {
        return Vec::new();
    }
    let mut rng = stream(seed, purpose::HOLDOUT, 0);
    let groups: Vec<Vec<usize>> = match table.task {
        Task::Regress => vec![(0..table.rows()).collect()],
        Task::Classify { classes } => (0..classes)
            .map(|c| {
                (0..table.rows())
                    .filter(|&i| table.y[i] as usize == c)
                    .collect()
            })
            .collect(),
    };
    let mut out = Vec::new();
    for mut g in groups {
        let take = (fraction * g.len() as f64).round() as usize;
        for j in 0..take.min(g.len()) {
            let k = rng.gen_range(j..g.len());
            g.swap(j, k);
        }
        out.extend_from_slice(&g[..take.min(g.len())]);
    }
    out.sort_unstable();
    out
}

/// FNV-1a hash (64 bits, hex) of the holdout: its row count, then each held-out row's whole
/// record as read ([`Table::records`]), so that the same observations held out under other
/// `features` or another `target` are the same holdout (sweep 69: dropping one feature restarted
/// the ledger's count of the same rows). Changing any value in a held-out row, or which rows
/// are held out, changes it. A table built in memory (no records) hashes as [`hash_values`].
pub fn hash(table: &Table, rows: &[usize]) -> String {
    if table.records.len() != table.rows() {
        return hash_values(table, rows);
    }
    words_hash(std::iter::once(rows.len() as u64).chain(rows.iter().map(|&i| table.records[i])))
}

/// The holdout's hash before 0.3.10: its row count, then each row's inputs (the columns the run
/// uses) and response as IEEE bits. A ledger entry under it is carried on under [`hash`].
pub fn hash_values(table: &Table, rows: &[usize]) -> String {
    words_hash(
        std::iter::once(rows.len() as u64).chain(rows.iter().flat_map(|&i| {
            table
                .x
                .row(i)
                .iter()
                .chain(std::iter::once(&table.y[i]))
                .map(|v| v.to_bits())
                .collect::<Vec<_>>()
        })),
    )
}

/// FNV-1a (64 bit, [`crate::codec::fnv1a64`]) of `words` as little-endian bytes, in 16 hex
/// digits.
fn words_hash(words: impl Iterator<Item = u64>) -> String {
    let bytes: Vec<u8> = words.flat_map(u64::to_le_bytes).collect();
    format!("{:016x}", crate::codec::fnv1a64(&bytes))
}
