//! apportion explains individual model decisions with removal-based
//! attributions: how features are removed, which model behaviour is
//! measured, and how coalition values are summarised are three independent
//! choices served by one engine.
//!
//! # Layout
//! - [`engine`]: coalitions, games and their cache, removal, targets,
//!   summaries, estimators and the planner. Pure numeric code.
//! - [`model`]: the [`model::Model`] trait and the model kinds (linear, tree
//!   ensembles).
//! - `demo` (feature `demo`, on by default): the fictional housing
//!   co-operative: synthetic applicants and the two models trained on them;
//!   not part of the library proper.
//! - [`client`]: the thin gRPC client behind `apportion models` and `explain`.
//! - [`drift`]: attribution summaries over time windows and their drift.
//! - [`reasons`]: attributions → principal reason statements.
//! - [`registry`]: registered models, versions and backgrounds, persisted crash-safely
//!   in a directory, or shared by several replicas in PostgreSQL.
//! - [`service`]: the gRPC API: conversions, error → status, handlers, `run`.
//! - [`telemetry`]: log subscriber and Prometheus metrics.
#![deny(unsafe_code)]

pub mod client;
#[cfg(feature = "demo")]
pub mod demo;
pub mod drift;
pub mod engine;
pub mod model;
pub mod reasons;
pub mod registry;
pub mod service;
pub mod telemetry;
