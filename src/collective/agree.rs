//! What processes agree on through a group: who handles which rows, whether everyone is
//! ready, whether they all see the same input, and the outcome of a write made by one.

use super::reduce::Collective;
use crate::error::{Error, Result};

/// The half-open range of the `len` items (rows of a minibatch, say) that process `rank` of
/// `size` handles: consecutive blocks whose lengths differ by at most one, in rank order.
///
/// # Example
/// ```
/// use neural_sde::collective::share;
/// assert_eq!(share(10, 0, 3), 0..4);
/// assert_eq!(share(10, 1, 3), 4..7);
/// assert_eq!(share(10, 2, 3), 7..10);
/// ```
pub fn share(len: usize, rank: usize, size: usize) -> std::ops::Range<usize> {
    let size = size.max(1);
    let (q, r) = (len / size, len % size);
    let start = rank * q + rank.min(r);
    let end = start + q + usize::from(rank < r);
    start.min(len)..end.min(len)
}

/// Whether every process passes `ok`: a sum of failure flags, so that an error on one
/// process ends every process at the same point instead of leaving the others waiting in the
/// next reduction. Returns the ranks that failed.
///
/// # Errors
/// As [`Collective::sum_f64`].
pub fn failed_ranks(group: &dyn Collective, ok: bool) -> Result<Vec<usize>> {
    let mut flags = vec![0.0; group.size()];
    if !ok {
        flags[group.rank()] = 1.0;
    }
    group.sum_f64(&mut flags)?;
    Ok(flags
        .iter()
        .enumerate()
        .filter(|(_, f)| **f > 0.0)
        .map(|(r, _)| r)
        .collect())
}

/// Checks that every process holds the same `value` (a table's checksum, say); the error
/// names the ranks whose value differs from rank 0's.
///
/// # Errors
/// [`Error::Collective`] naming `what` and the ranks that differ.
pub fn check_same(group: &dyn Collective, what: &str, value: u64) -> Result<()> {
    let mut bytes = value.to_le_bytes().to_vec();
    group.broadcast(&mut bytes, 0)?;
    let root = <[u8; 8]>::try_from(bytes.as_slice())
        .map(u64::from_le_bytes)
        .map_err(|_| Error::Collective("a broadcast returned the wrong length".into()))?;
    let differ = failed_ranks(group, root == value)?;
    if differ.is_empty() {
        Ok(())
    } else {
        let list: Vec<String> = differ.iter().map(usize::to_string).collect();
        Err(Error::Collective(format!(
            "process(es) {} of {} see a different {what} from process 0; give every process the same input",
            list.join(", "),
            group.size()
        )))
    }
}

/// Runs `write` on process 0 only (files are written once per group) and gives every
/// process the same outcome: process 0 its own result, the others an error naming the
/// failure when process 0's write failed. Every process must call it at the same point.
///
/// # Errors
/// `write`'s error on process 0; [`Error::Collective`] on the others when it failed.
pub fn on_root(
    group: &dyn Collective,
    what: &str,
    write: impl FnOnce() -> Result<()>,
) -> Result<()> {
    let result = if group.rank() == 0 { write() } else { Ok(()) };
    if group.size() == 1 {
        return result;
    }
    let failed = failed_ranks(group, result.is_ok())?;
    match result {
        Ok(()) if failed.is_empty() => Ok(()),
        Ok(()) => Err(Error::Collective(format!(
            "process 0 could not write {what}; its message says why"
        ))),
        Err(e) => Err(e),
    }
}

/// Refuses a group with more processes than `rows` (each process needs rows of its own) or a
/// process whose `data` checksum or `settings` (hashed as JSON) differ from process 0's.
///
/// # Errors
/// [`Error::Collective`] naming the ranks or counts; [`Error::Json`] if the settings cannot
/// be serialised.
pub(crate) fn check_group(
    group: &dyn Collective,
    rows: usize,
    what: &str,
    data: u64,
    settings: &impl serde::Serialize,
) -> Result<()> {
    if group.size() > rows {
        return Err(Error::Collective(format!(
            "{} processes for {rows} {what}: every process needs at least one; start at most {rows} processes",
            group.size()
        )));
    }
    let mut h = crate::util::hash::Fnv1a::new();
    h.eat(&data.to_le_bytes());
    h.eat(serde_json::to_string(settings)?.as_bytes());
    check_same(group, "table or settings", h.finish())
}
