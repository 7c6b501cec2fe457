//! Room for deep recursion: the recursions over a quadtree go one frame per
//! level, and a state advanced 10^100000 generations has a root of level
//! about 332,000, far deeper than a thread's default stack.

use crate::error::StackRefused;

/// Levels below this run on the caller's stack.
const SHALLOW_LEVELS: u32 = 1500;
/// Stack reserved per level of recursion: the advance's frames take about
/// 425 bytes a level (measured in a release build); debug builds more.
const BYTES_PER_LEVEL: usize = 2048;
const BASE_BYTES: usize = 16 << 20;

/// Runs `work`, on a thread with a stack deep enough for a recursion over
/// `level` levels when the caller's might not be.
pub(crate) fn deep<T: Send>(
    level: u32,
    work: impl FnOnce() -> T + Send,
) -> Result<T, StackRefused> {
    if level < SHALLOW_LEVELS {
        return Ok(work());
    }
    let size = BASE_BYTES + level as usize * BYTES_PER_LEVEL;
    std::thread::scope(|scope| {
        let worker = std::thread::Builder::new()
            .name("deeptime-deep".into())
            .stack_size(size)
            .spawn_scoped(scope, work)
            .map_err(|_| StackRefused {
                bytes: size as u64,
                levels: level,
            })?;
        match worker.join() {
            Ok(value) => Ok(value),
            Err(panic) => std::panic::resume_unwind(panic),
        }
    })
}
