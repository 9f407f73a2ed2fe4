//! One chunk of slates through the grid ([`medley_core::replay::Grid`]) on all cores, in two
//! parallel steps so the result does not depend on the number of threads: slates in parallel
//! (kernels and per-slate metrics, one pool workspace per thread), then cells in parallel, each
//! adding the chunk's rows in line order.

use rayon::prelude::*;

use crate::serve::pool::run_here;
use medley_core::replay::{Grid, LoggedSlate, SlateRows};

/// Evaluates every cell of `grid` on `slates` and adds them to its accumulators; `items` is the
/// number of distinct items numbered so far.
///
/// # Errors
/// A message if an algorithm rejects a slate (cannot happen for validated slates with
/// embeddings, and with profiles for `calibrated`; reported rather than panicking), or a kernel
/// panicked.
pub fn add_chunk(grid: &mut Grid, slates: &[LoggedSlate], items: usize) -> Result<(), String> {
    let outs: Vec<SlateRows> = {
        let grid = &*grid;
        slates
            .par_iter()
            .map(|s| match run_here(|ws| grid.evaluate(s, ws)) {
                Ok(Ok(rows)) => Ok(rows),
                Ok(Err(e)) => Err(format!("line {}: {e}", s.line)),
                Err(e) => Err(format!("line {}: {e}", s.line)),
            })
            .collect::<Result<_, _>>()?
    };
    grid.set_items(items);
    grid.accumulators_mut().par_iter_mut().enumerate().for_each(|(c, acc)| acc.add(c, &outs, items));
    Ok(())
}
