//! What the engine's test files share.

use deeptime_engine::pattern::{Builder, Pattern};

/// A seeded soup (xorshift), `side`×`side`, each cell alive with
/// probability `density`/256.
pub fn soup(seed: u64, side: u64, density: u64) -> Pattern {
    let mut state = seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) | 1;
    let mut cells = Builder::new(1 << 30);
    for y in 0..side {
        for x in 0..side {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            if state % 256 < density {
                cells.push_run(y, x, 1).unwrap();
            }
        }
    }
    cells.finish(None)
}
