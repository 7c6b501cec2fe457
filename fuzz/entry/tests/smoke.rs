//! The fuzz targets' smoke run on the stable toolchain: every seed of
//! `fuzz/corpus/<target>/` and a thousand deterministic mutations of
//! them per target (byte flips, interesting bytes, insertions, deletions,
//! truncations, duplicated ranges, splices of two seeds) go through the
//! same harness as the cargo-fuzz targets. Each input must return without
//! a panic, within a bounded allocation and a bounded time (a hang, not a
//! speed check). The long coverage-guided runs are `fuzz/run`.

use std::alloc::{GlobalAlloc, Layout, System};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::PathBuf;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use deeptime_fuzz::TARGETS;

/// Counts the bytes held and the most held since the last reset.
struct Counting;

static HELD: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);

// SAFETY: every call is passed to the system allocator unchanged; only
// counters are kept beside it.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        // SAFETY: as the caller promised for `layout`.
        let pointer = unsafe { System.alloc(layout) };
        if !pointer.is_null() {
            let held = HELD.fetch_add(layout.size(), Ordering::Relaxed) + layout.size();
            PEAK.fetch_max(held, Ordering::Relaxed);
        }
        pointer
    }

    unsafe fn dealloc(&self, pointer: *mut u8, layout: Layout) {
        HELD.fetch_sub(layout.size(), Ordering::Relaxed);
        // SAFETY: as the caller promised for `pointer` and `layout`.
        unsafe { System.dealloc(pointer, layout) }
    }

    unsafe fn realloc(&self, pointer: *mut u8, layout: Layout, size: usize) -> *mut u8 {
        // SAFETY: as the caller promised for `pointer`, `layout` and `size`.
        let moved = unsafe { System.realloc(pointer, layout, size) };
        if !moved.is_null() {
            HELD.fetch_sub(layout.size(), Ordering::Relaxed);
            let held = HELD.fetch_add(size, Ordering::Relaxed) + size;
            PEAK.fetch_max(held, Ordering::Relaxed);
        }
        moved
    }
}

#[global_allocator]
static ALLOCATOR: Counting = Counting;

/// Mutations per target (on top of the seeds themselves).
const MUTATIONS: usize = 1000;
/// The most one input may allocate beyond what was held before it: the
/// harness's reading budget (`deeptime_fuzz::BUDGET`) with room for the
/// parsers' own bookkeeping. Anything past it is an allocation blow-up.
const MOST_BYTES: usize = 4 * deeptime_fuzz::BUDGET as usize;
/// The longest one input may take: far beyond any parse of a few KiB, so
/// only a hang (or a quadratic blow-up) reaches it.
const MOST_TIME: Duration = Duration::from_secs(10);

/// splitmix64 (common practice): a seeded, repeatable stream.
struct Stream(u64);

impl Stream {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// A number below `bound` (at least 1).
    fn below(&mut self, bound: usize) -> usize {
        (self.next() % bound.max(1) as u64) as usize
    }
}

/// Bytes that parsers treat specially: ends of lines and files, digits,
/// signs, the RLE and rule letters, bounds of integer widths.
const INTERESTING: &[u8] = b"\0\n\r\t !#$*+-./0123456789:=BSbo^[]{}\",\x7f\x80\xff";

/// One to four mutations of `seed`, some splicing in `other`.
fn mutate(seed: &[u8], other: &[u8], stream: &mut Stream) -> Vec<u8> {
    let mut bytes = seed.to_vec();
    for _ in 0..1 + stream.below(4) {
        let len = bytes.len();
        match stream.below(8) {
            0 if len > 0 => {
                let at = stream.below(len);
                bytes[at] ^= 1 << stream.below(8);
            }
            1 if len > 0 => {
                let at = stream.below(len);
                bytes[at] = INTERESTING[stream.below(INTERESTING.len())];
            }
            2 => {
                let at = stream.below(len + 1);
                let run = 1 + stream.below(8);
                let byte = INTERESTING[stream.below(INTERESTING.len())];
                bytes.splice(at..at, std::iter::repeat_n(byte, run));
            }
            3 if len > 0 => {
                let at = stream.below(len);
                let end = (at + 1 + stream.below(16)).min(len);
                bytes.drain(at..end);
            }
            4 => bytes.truncate(stream.below(len + 1)),
            5 if len > 0 => {
                // A range repeated: long digit strings, nested repeats.
                let at = stream.below(len);
                let end = (at + 1 + stream.below(32)).min(len);
                let copy = bytes[at..end].to_vec();
                let times = 1 + stream.below(64);
                let to = stream.below(len + 1);
                bytes.splice(
                    to..to,
                    copy.iter().copied().cycle().take(copy.len() * times),
                );
            }
            6 if !other.is_empty() => {
                let cut = stream.below(len + 1);
                let from = stream.below(other.len());
                bytes.truncate(cut);
                bytes.extend_from_slice(&other[from..]);
            }
            _ if len >= 8 => {
                // A little-endian integer field set to an edge value.
                let at = stream.below(len - 7);
                let edge = [0u64, 1, u32::MAX as u64, u64::MAX, 1 << 40, 1 << 63];
                let value = edge[stream.below(edge.len())];
                bytes[at..at + 8].copy_from_slice(&value.to_le_bytes());
            }
            _ => bytes.push(stream.next() as u8),
        }
    }
    bytes
}

fn corpus(name: &str) -> Vec<Vec<u8>> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../corpus")
        .join(name);
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap_or_else(|error| panic!("{}: {error}", dir.display()))
        .map(|entry| entry.expect("a corpus entry").path())
        .collect();
    files.sort();
    files
        .iter()
        .map(|file| std::fs::read(file).unwrap_or_else(|e| panic!("{}: {e}", file.display())))
        .collect()
}

/// Runs one input; a description of what went wrong, if anything did.
fn check(run: fn(&[u8]), input: &[u8]) -> Option<String> {
    let before = HELD.load(Ordering::Relaxed);
    PEAK.store(before, Ordering::Relaxed);
    let start = Instant::now();
    let outcome = catch_unwind(AssertUnwindSafe(|| run(input)));
    let took = start.elapsed();
    let grew = PEAK.load(Ordering::Relaxed).saturating_sub(before);
    if let Err(panic) = outcome {
        let message = panic
            .downcast_ref::<String>()
            .cloned()
            .or_else(|| panic.downcast_ref::<&str>().map(|s| s.to_string()))
            .unwrap_or_default();
        return Some(format!("panicked: {message}"));
    }
    if grew > MOST_BYTES {
        return Some(format!("allocated {grew} bytes (at most {MOST_BYTES})"));
    }
    if took > MOST_TIME {
        return Some(format!("took {took:?} (at most {MOST_TIME:?})"));
    }
    None
}

/// Shows an input in a failure message: escaped, cut at 200 bytes.
fn show(input: &[u8]) -> String {
    let cut = &input[..input.len().min(200)];
    format!("{} bytes: \"{}\"", input.len(), cut.escape_ascii())
}

#[test]
fn every_fuzz_target_survives_its_corpus_and_mutations_of_it() {
    // The harness's own panics are caught and reported below, quietly.
    std::panic::set_hook(Box::new(|_| {}));
    let mut failures = Vec::new();
    for (index, target) in TARGETS.iter().enumerate() {
        let seeds = corpus(target.name);
        assert!(
            !seeds.is_empty(),
            "fuzz/corpus/{} holds no seeds",
            target.name
        );
        let mut stream = Stream(0x5eed_0000 + index as u64);
        let mutations = (0..MUTATIONS).map(|_| {
            let seed = &seeds[stream.below(seeds.len())];
            let other = &seeds[stream.below(seeds.len())];
            mutate(seed, other, &mut stream)
        });
        let inputs: Vec<Vec<u8>> = seeds.iter().cloned().chain(mutations).collect();
        for input in &inputs {
            if let Some(what) = check(target.run, input) {
                failures.push(format!("{}: {what}; input {}", target.name, show(input)));
            }
        }
        println!("{}: {} inputs", target.name, inputs.len());
    }
    let _ = std::panic::take_hook();
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// The harness that lets `pack_records` reach the record decoder must make
/// packs as the writer does, or its mutations would all stop at the table:
/// the seed made from a real incremental pack (the lighthouse at 10^29,
/// written by `deeptime run` after its generation-0 pack) is rebuilt byte
/// for byte.
#[test]
fn the_pack_records_harness_rebuilds_a_real_pack_byte_for_byte() {
    let seed = std::fs::read(
        PathBuf::from(env!("CARGO_MANIFEST_DIR"))
            .join("../corpus/pack_records/lighthouse-gen1e29.bin"),
    )
    .unwrap();
    let real = std::fs::read(
        PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../corpus/pack/lighthouse-gen1e29.pack"),
    )
    .unwrap();
    let records = u16::from_le_bytes([seed[0], seed[1]]) as u64;
    let base = deeptime_engine::pack::pack_name(deeptime_fuzz::BASE_PACK);
    let made = deeptime_fuzz::pack_around(&seed[2..], records, &[base]);
    assert!(
        made == real,
        "the harness's pack differs from the one deeptime wrote"
    );
}
