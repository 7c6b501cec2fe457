//! The memory budget: `--memory SIZE`, or a share of this machine's memory.

use bytesize::ByteSize;

use deeptime_engine::BadInput;

/// The smallest budget accepted: below it nothing useful fits.
pub const MIN_BUDGET: u64 = 1 << 20;

/// The budget in bytes from the option's text, or the default: half of the
/// machine's memory, so the rest of the system keeps room.
pub fn budget(option: Option<&str>) -> Result<u64, BadInput> {
    let Some(text) = option else {
        let mut system = sysinfo::System::new().map_err(|error| {
            BadInput(format!(
                "cannot read this machine's memory size ({error}); give --memory"
            ))
        })?;
        system.refresh_memory();
        return Ok((system.total_memory() / 2).max(MIN_BUDGET));
    };
    let size = size("--memory", text)?;
    if size < MIN_BUDGET {
        return Err(BadInput(format!(
            "--memory {text} is below the smallest budget of 1 MiB"
        )));
    }
    Ok(size)
}

/// The bytes of a size option's text (`option` names it in the error).
pub fn size(option: &str, text: &str) -> Result<u64, BadInput> {
    let size: ByteSize = text.trim().parse().map_err(|error| {
        BadInput(format!(
            "{option} {text:?} is not a size ({error}); write e.g. 2GiB or 512MiB"
        ))
    })?;
    Ok(size.as_u64())
}

/// Makes the allocator map every large block on its own and unmap it when
/// freed. By default it raises that threshold after a large block is freed
/// (a pattern read, then dropped), so the quad store's arena and table then
/// grow inside the heap, where each reallocation leaves the old copy behind
/// as a hole: the process used up to twice its budget. With a fixed
/// threshold a growing arena is moved by remapping, never copied, and what
/// is freed goes back to the system at once.
pub fn return_large_blocks() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: tuning the allocator at start-up, before any thread exists.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 256 << 10);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 1 << 20);
    }
}
