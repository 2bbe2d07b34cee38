//! Logging (structured events through `tracing`, as text or JSON lines, filtered by RUST_LOG) and the
//! service's metrics registry (`metrics`).

pub mod metrics;

use crate::config::LogFormat;
use tracing_subscriber::EnvFilter;

pub fn init(format: LogFormat) {
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info,tower_http=info"));
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Json => builder.json().try_init(),
        LogFormat::Text => builder.try_init(),
    };
}
