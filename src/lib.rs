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
//! - [`reasons`]: attributions → principal reason statements.
#![deny(unsafe_code)]

pub mod engine;
pub mod model;
pub mod reasons;
