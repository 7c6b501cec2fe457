//! Messages of the long-running roles (`deeptime coordinator`, `deeptime
//! node`) go through `tracing` to standard error, one timestamped line per
//! event; `DEEPTIME_LOG` (an env-filter such as `debug` or
//! `deeptime_node=debug`) overrides each role's default level.

/// Sends `tracing` events to standard error, at `default` (e.g. "info")
/// unless `DEEPTIME_LOG` says otherwise.
pub fn init(default: &str) {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_target(false)
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("DEEPTIME_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default)),
        )
        .init();
}
