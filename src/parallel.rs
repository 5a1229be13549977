//! How much of the machine a run may use, and the one way work is spread
//! over threads: [`ordered`] runs numbered items on worker threads and hands
//! their results to one consumer in item order, so what the consumer builds
//! (a [`Merge`] of per-pass statistics, a list of outputs) is the same
//! whatever the thread count and whichever thread finished first.
//!
//! **Invariant:** no crate-internal imports; a result is consumed in item
//! order, never in completion order.

use std::collections::BTreeMap;
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::mpsc;

/// A per-item result that combines with the results of later items: the
/// accumulators of one forward pass merge into those of the passes before
/// it. `ordered` calls it in item order only, so a non-commutative merge
/// (appending per-sample values, floating-point sums) is deterministic.
pub trait Merge {
    /// Folds `later`, the result of the next item, into `self`.
    fn merge(&mut self, later: Self);
}

impl<T> Merge for Vec<T> {
    /// Appends: per-sample values of later passes come after earlier ones.
    fn merge(&mut self, later: Self) {
        self.extend(later);
    }
}

/// What a run may use: threads in all (passes at once times threads inside
/// a pass) and bytes of live activations of all passes at once.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Budget {
    /// Threads in all; `None`: the cores this process may run on.
    pub threads: Option<usize>,
    /// Bytes the live activations of all concurrent passes may take
    /// together; `None`: half the memory the system has available.
    pub memory: Option<u64>,
}

impl Budget {
    /// The documented defaults: every core available, half the available
    /// memory.
    pub const STANDARD: Budget = Budget { threads: None, memory: None };

    /// A budget of one thread (and the standard memory budget).
    pub const ONE_THREAD: Budget = Budget { threads: Some(1), memory: None };

    /// The threads this budget allows (at least 1).
    pub fn threads(&self) -> usize {
        self.threads.unwrap_or_else(available_threads).max(1)
    }

    /// The bytes of live activations this budget allows.
    pub fn memory(&self) -> u64 {
        self.memory.unwrap_or_else(|| available_memory().map_or(FALLBACK_MEMORY, |m| m / 2))
    }

    /// The share of one of `jobs` jobs running at once: the threads and
    /// memory divided between them (at least one thread each).
    pub fn share(&self, jobs: usize) -> Budget {
        let jobs = jobs.max(1);
        Budget {
            threads: Some((self.threads() / jobs).max(1)),
            memory: Some(self.memory() / jobs as u64),
        }
    }
}

/// The stack of a worker thread: that of a process's main thread on Linux.
const WORKER_STACK: usize = 8 << 20;

/// The memory budget when the system does not say what it has available.
const FALLBACK_MEMORY: u64 = 2 << 30;

/// The cores this process may run on: `std::thread::available_parallelism`,
/// which on Linux takes the CPU affinity mask and the cgroup CPU quota into
/// account (1 when it cannot tell).
pub fn available_threads() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// `MemAvailable` of `/proc/meminfo`, in bytes (`None` where there is none).
pub fn available_memory() -> Option<u64> {
    let text = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = text.lines().find_map(|l| l.strip_prefix("MemAvailable:"))?;
    let kib: u64 = line.trim().trim_end_matches("kB").trim().parse().ok()?;
    Some(kib * 1024)
}

/// Runs `work(state, i)` for every item `i` in `0..items` on up to
/// `threads` threads, each with its own state from `init` (made on the
/// thread that uses it), and hands each result to `consume(i, result)` on
/// the calling thread in item order. `done` is called on the calling thread
/// as each item finishes (in completion order), for progress.
///
/// Items are taken in order. On the first error (or panic, which becomes
/// an error through `panicked`) no new item is taken; the items already
/// taken finish, and the error of the lowest item is returned, so the error
/// too does not depend on the thread count. With one thread everything runs
/// on the calling thread.
pub fn ordered<S, T, E>(
    items: usize,
    threads: usize,
    init: &(dyn Fn() -> Result<S, E> + Sync),
    work: &(dyn Fn(&mut S, usize) -> Result<T, E> + Sync),
    panicked: &(dyn Fn(String) -> E + Sync),
    consume: &mut dyn FnMut(usize, T) -> Result<(), E>,
    done: &mut dyn FnMut(usize),
) -> Result<(), E>
where
    T: Send,
    E: Send,
{
    let threads = threads.clamp(1, items.max(1));
    if threads == 1 {
        return sequential(0..items, init, work, panicked, consume, done);
    }
    let next = AtomicUsize::new(0);
    let stop = AtomicBool::new(false);
    let (tx, rx) = mpsc::channel::<(usize, Result<T, E>)>();
    let (outcome, consumed) = std::thread::scope(|scope| {
        for _ in 0..threads {
            let tx = tx.clone();
            let (next, stop) = (&next, &stop);
            // The main thread's stack size: deep models recurse in places.
            let builder = std::thread::Builder::new().stack_size(WORKER_STACK);
            let spawned = builder.spawn_scoped(scope, move || {
                let mut state = match guarded(init, panicked) {
                    Ok(s) => s,
                    Err(e) => {
                        stop.store(true, Ordering::SeqCst);
                        // The item this thread would have taken reports the error.
                        let _ = tx.send((next.fetch_add(1, Ordering::SeqCst), Err(e)));
                        return;
                    }
                };
                while !stop.load(Ordering::SeqCst) {
                    let i = next.fetch_add(1, Ordering::SeqCst);
                    if i >= items {
                        break;
                    }
                    let r = guarded(|| work(&mut state, i), panicked);
                    if r.is_err() {
                        stop.store(true, Ordering::SeqCst);
                    }
                    if tx.send((i, r)).is_err() {
                        break;
                    }
                }
            });
            // A thread that cannot start leaves its share to the others.
            drop(spawned);
        }
        drop(tx);
        // The consumer: results in item order; out-of-order ones wait here.
        let mut waiting: BTreeMap<usize, Result<T, E>> = BTreeMap::new();
        let mut first_error: Option<(usize, E)> = None;
        let mut expected = 0;
        for (i, r) in rx {
            if r.is_ok() {
                done(i);
            }
            waiting.insert(i, r);
            while first_error.is_none() {
                let Some(r) = waiting.remove(&expected) else { break };
                let consumed = r.and_then(|value| consume(expected, value));
                if let Err(e) = consumed {
                    stop.store(true, Ordering::SeqCst);
                    first_error = Some((expected, e));
                }
                expected += 1;
            }
        }
        // Items after an error stay in `waiting`; an earlier item's error
        // (one taken before the error stopped the others) wins.
        let err = waiting.into_iter().find_map(|(i, r)| r.err().map(|e| (i, e)));
        let outcome = match (first_error, err) {
            (Some((i, e)), Some((j, f))) => Err(if j < i { f } else { e }),
            (Some((_, e)), None) | (None, Some((_, e))) => Err(e),
            (None, None) => Ok(()),
        };
        (outcome, expected)
    });
    outcome?;
    // Only when no thread could be started: the rest on this thread.
    sequential(consumed..items, init, work, panicked, consume, done)
}

/// [`ordered`] on the calling thread, for the items of `range`.
fn sequential<S, T, E>(
    range: std::ops::Range<usize>,
    init: &(dyn Fn() -> Result<S, E> + Sync),
    work: &(dyn Fn(&mut S, usize) -> Result<T, E> + Sync),
    panicked: &(dyn Fn(String) -> E + Sync),
    consume: &mut dyn FnMut(usize, T) -> Result<(), E>,
    done: &mut dyn FnMut(usize),
) -> Result<(), E> {
    if range.is_empty() {
        return Ok(());
    }
    let mut state = guarded(init, panicked)?;
    for i in range {
        let r = guarded(|| work(&mut state, i), panicked)?;
        done(i);
        consume(i, r)?;
    }
    Ok(())
}

/// Runs `f`, turning a panic into an error: `panicked` gets the panic's
/// message. The one place a panic is caught around the engine.
pub(crate) fn guarded<T, E>(
    f: impl FnOnce() -> Result<T, E>,
    panicked: impl Fn(String) -> E,
) -> Result<T, E> {
    catch_unwind(AssertUnwindSafe(f)).unwrap_or_else(|panic| {
        let what = panic
            .downcast_ref::<String>()
            .cloned()
            .or_else(|| panic.downcast_ref::<&str>().map(|s| (*s).to_owned()))
            .unwrap_or_else(|| "unknown cause".to_owned());
        Err(panicked(what))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn run(threads: usize, items: usize, fail: Option<usize>) -> Result<Vec<usize>, String> {
        let mut seen = Vec::new();
        let mut finished = 0;
        let work = |state: &mut usize, i: usize| -> Result<usize, String> {
            *state += 1;
            // Uneven work, so items finish out of order.
            std::thread::sleep(std::time::Duration::from_micros(((items - i) * 37 % 200) as u64));
            match fail {
                Some(f) if i == f => Err(format!("item {i} failed")),
                _ => Ok(i * i),
            }
        };
        ordered(
            items,
            threads,
            &|| Ok(0usize),
            &work,
            &|what| format!("panic: {what}"),
            &mut |i, v| {
                assert_eq!(v, i * i);
                seen.push(i);
                Ok(())
            },
            &mut |_| finished += 1,
        )?;
        assert_eq!(finished, items);
        Ok(seen)
    }

    #[test]
    fn results_arrive_in_item_order_for_any_thread_count() {
        for threads in [1, 2, 3, 8] {
            assert_eq!(run(threads, 23, None).unwrap(), (0..23).collect::<Vec<_>>(), "{threads}");
        }
        assert_eq!(run(4, 0, None).unwrap(), Vec::<usize>::new());
    }

    #[test]
    fn the_lowest_failing_item_is_the_error() {
        for threads in [1, 2, 5] {
            assert_eq!(run(threads, 30, Some(7)).unwrap_err(), "item 7 failed", "{threads}");
        }
    }

    #[test]
    fn a_panic_becomes_an_error() {
        for threads in [1, 3] {
            let r: Result<(), String> = ordered(
                5,
                threads,
                &|| Ok(()),
                &|_, i| if i == 2 { panic!("boom") } else { Ok(i) },
                &|what| format!("panic: {what}"),
                &mut |_, _| Ok(()),
                &mut |_| {},
            );
            assert_eq!(r.unwrap_err(), "panic: boom");
        }
    }

    #[test]
    fn shares_divide_the_budget() {
        let b = Budget { threads: Some(4), memory: Some(1000) };
        assert_eq!(b.share(2), Budget { threads: Some(2), memory: Some(500) });
        assert_eq!(b.share(3).threads, Some(1));
        assert_eq!(b.share(8).threads, Some(1));
        assert_eq!(Budget::STANDARD.threads(), available_threads());
    }
}
