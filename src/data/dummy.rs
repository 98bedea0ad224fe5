//! Dummy treatment codes for the blinded dry run.
//!
//! The dry run must exercise every planned analysis without the
//! randomisation list. This module makes an allocation table in memory: within
//! each stratum (the levels of the first stratification factor the plan uses,
//! or one stratum when there is none) the arms are dealt in turn, so that arm
//! sizes are as equal as the stratum allows, and then shuffled with a seeded
//! generator. The same seed always gives the same codes; the codes carry no
//! information about the real allocation because the real list is never read.
//!
//! Generator: SplitMix64 (Steele, Lea and Flood 2014, "Fast splittable
//! pseudorandom number generators", OOPSLA), used for a Fisher–Yates shuffle
//! with Lemire's multiply-shift reduction to a range.

use super::Table;
use crate::plan::Plan;

/// SplitMix64: a small, well-studied 64-bit generator.
struct SplitMix64(u64);

impl SplitMix64 {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// A uniform integer in 0..bound (bound > 0), by multiply-shift.
    fn below(&mut self, bound: usize) -> usize {
        ((u128::from(self.next()) * bound as u128) >> 64) as usize
    }
}

/// The name shown for the dummy allocation wherever a file name would appear.
pub fn dummy_allocation_name(seed: u64) -> String {
    format!("dummy allocation (seed {seed})")
}

/// An allocation table with the plan's key and treatment columns, one row per
/// subject of `subjects`, arms balanced within strata and shuffled by `seed`.
pub fn dummy_allocation(plan: &Plan, subjects: &Table, seed: u64) -> Table {
    let key_column = subjects.column_index(&plan.data.key);
    let stratum_column = plan
        .analyses
        .iter()
        .flat_map(|analysis| analysis.strata.iter())
        .next()
        .and_then(|&variable| subjects.column_index(&plan.variables[variable].name));
    // Group rows by stratum value, in sorted order of the values so the result
    // does not depend on row order within the file beyond the shuffle.
    let mut strata: std::collections::BTreeMap<String, Vec<usize>> =
        std::collections::BTreeMap::new();
    for row in 0..subjects.n_rows() {
        let value = stratum_column
            .map(|column| subjects.cell(row, column).trim().to_string())
            .unwrap_or_default();
        strata.entry(value).or_default().push(row);
    }
    let n_arms = plan.data.treatment.arms.len();
    let mut generator = SplitMix64(seed ^ 0x6361_6972_6e2d_6472); // mixes in a constant so seed 0 is not special
    let mut arm_of_row = vec![0usize; subjects.n_rows()];
    for rows in strata.values() {
        // Start the dealing at a random arm so small strata do not all favour the first arms.
        let offset = generator.below(n_arms);
        let mut arms: Vec<usize> = (0..rows.len())
            .map(|position| (position + offset) % n_arms)
            .collect();
        for index in (1..arms.len()).rev() {
            let other = generator.below(index + 1);
            arms.swap(index, other);
        }
        for (row, arm) in rows.iter().zip(arms) {
            arm_of_row[*row] = arm;
        }
    }
    let mut table = Table::new(
        dummy_allocation_name(seed),
        vec![plan.data.key.clone(), plan.data.treatment.column.clone()],
    );
    for (row, &arm) in arm_of_row.iter().enumerate() {
        let key = key_column.map_or("", |column| subjects.cell(row, column));
        table.push_row(
            [key, plan.data.treatment.arms[arm].code.as_str()],
            subjects.lines[row],
        );
    }
    table
}

#[cfg(test)]
mod tests {
    use super::SplitMix64;

    #[test]
    fn splitmix64_matches_its_reference_sequence() {
        // Reference outputs for seed 1234567, from the published SplitMix64 test vectors
        // (as used in the demo data generator's tests; Rosetta Code "Pseudo-random numbers/Splitmix64").
        let mut generator = SplitMix64(1234567);
        let expected = [
            6457827717110365317u64,
            3203168211198807973,
            9817491932198370423,
            4593380528125082431,
            16408922859458223821,
        ];
        for value in expected {
            assert_eq!(generator.next(), value);
        }
    }
}
