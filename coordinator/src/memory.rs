//! The memory budget: `--memory SIZE`, or a share of this machine's memory.

use bytesize::ByteSize;

use crate::failure::BadInput;

/// The smallest budget accepted: below it nothing useful fits.
const MIN_BUDGET: u64 = 1 << 20;

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
    let size: ByteSize = text.trim().parse().map_err(|error| {
        BadInput(format!(
            "--memory {text:?} is not a size ({error}); write e.g. 2GiB or 512MiB"
        ))
    })?;
    if size.as_u64() < MIN_BUDGET {
        return Err(BadInput(format!(
            "--memory {text} is below the smallest budget of 1 MiB"
        )));
    }
    Ok(size.as_u64())
}
