//! The gRPC face of apportion: the generated API types, their conversion to
//! registry and engine types, the error → status mapping, one file per
//! service, the compute pool, deadlines, draining, TLS, and the server that
//! runs them with health and reflection.
//!
//! Protobuf types stop here; nothing below this module knows about them.

mod attribution_log;
mod attributions;
pub mod auth;
pub mod config;
pub mod convert;
pub mod deadline;
mod diagnostics;
mod drain;
mod monitoring;
pub mod pool;
mod registry_api;
pub mod server;
pub mod status;
pub mod stream;
pub mod tls;

pub use attribution_log::{LogSettings, LogSink};
pub use config::{ConfigError, ConfigLayer};
pub use pool::ComputePool;
pub use server::{Config, Options, State, Transport, run, run_with};
pub use status::{ServiceError, status_of};
pub use stream::StreamStats;
pub use tls::{ServerTls, TlsError, TlsFiles};

/// Types and client/server stubs generated from
/// `proto/apportion/v1/apportion.proto`.
#[allow(clippy::all, clippy::pedantic, missing_docs)]
pub mod proto {
    tonic::include_proto!("apportion.v1");

    /// The encoded descriptor set of the API, served by reflection.
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        tonic::include_file_descriptor_set!("apportion_descriptor");
}
