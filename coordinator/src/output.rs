//! Output files written whole or not at all: into a temporary file beside
//! the destination, renamed over it only when everything was written, so a
//! failure never leaves a half-written file or destroys the old one.

use std::io::{BufWriter, Write};
use std::path::Path;

use deeptime_engine::OutputFailed;

/// The folder `out` is written in (the current one for a bare name).
pub fn folder_of(out: &Path) -> &Path {
    match out.parent() {
        Some(parent) if !parent.as_os_str().is_empty() => parent,
        _ => Path::new("."),
    }
}

/// Writes `out` with `fill`, which gets a buffered writer. Errors from
/// `fill` are reported as they are (they say what was wrong); errors of
/// the file itself as "cannot write OUT".
pub fn write_whole(
    out: &Path,
    fill: impl FnOnce(&mut BufWriter<&mut std::fs::File>) -> anyhow::Result<()>,
) -> anyhow::Result<()> {
    let cannot =
        |error: std::io::Error| OutputFailed(format!("cannot write {}: {error}", out.display()));
    let mut temporary = tempfile::NamedTempFile::new_in(folder_of(out)).map_err(cannot)?;
    {
        let mut writer = BufWriter::new(temporary.as_file_mut());
        fill(&mut writer)?;
        writer.flush().map_err(cannot)?;
    }
    temporary
        .persist(out)
        .map_err(|error| cannot(error.error))?;
    Ok(())
}
