//! Secondary suppression over total-and-parts constraints ("margins").
//!
//! A withheld cell that is the only withheld member of a constraint is recoverable by
//! subtraction (total − other parts, or the sum of the parts). So every constraint must have 0 or
//! at least 2 withheld members; where it has exactly 1, the released part with the smallest weight
//! (n_patients, or the magnitude for magnitude columns) is withheld too, or the total when no
//! part is left. A withheld member whose weight is zero does not count as protection: an
//! outsider who guesses that a withheld cell of a sparse table is an empty category recovers the
//! other one exactly (and a lone withheld zero is recovered as zero), so a constraint with any
//! withheld member needs at least two withheld members that hold patients. Withholding can break another constraint that was fine, so this runs to a fixed
//! point; it terminates because each pass only adds withheld cells.

use sluice_aggregate::Constraint;

/// Withholds more cells until every constraint has 0 or ≥ 2 withheld members. `weight[i]` picks
/// which cell to sacrifice (smallest first, then lowest row index, for determinism). Returns the
/// rows newly withheld, in the order they were chosen.
pub(crate) fn protect(
    constraints: &[Constraint],
    withheld: &mut [bool],
    weight: &[f64],
) -> Vec<usize> {
    let mut added = Vec::new();
    loop {
        let mut changed = false;
        for c in constraints {
            let members = || std::iter::once(c.total).chain(c.parts.iter().copied());
            let n = members().filter(|&r| withheld[r]).count();
            let held = members()
                .filter(|&r| withheld[r] && weight[r] > 0.0)
                .count();
            if n == 0 || held >= 2 {
                continue;
            }
            let pick = c
                .parts
                .iter()
                .copied()
                .filter(|&r| !withheld[r] && weight[r] > 0.0)
                .min_by(|&a, &b| weight[a].total_cmp(&weight[b]).then(a.cmp(&b)))
                .or((!withheld[c.total] && weight[c.total] > 0.0).then_some(c.total));
            if let Some(r) = pick {
                withheld[r] = true;
                added.push(r);
                changed = true;
            }
        }
        if !changed {
            return added;
        }
    }
}

/// Members withheld in each constraint, for the checker: a constraint is safe with 0 or ≥ 2.
pub fn unsafe_constraints<'a>(
    constraints: &'a [Constraint],
    withheld: &'a [bool],
) -> impl Iterator<Item = &'a Constraint> + 'a {
    constraints.iter().filter(move |c| {
        std::iter::once(c.total)
            .chain(c.parts.iter().copied())
            .filter(|&r| withheld.get(r).copied().unwrap_or(false))
            .count()
            == 1
    })
}
