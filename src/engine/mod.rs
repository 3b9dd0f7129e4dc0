//! The numeric core: removal ∘ model ∘ target defines a cooperative game over
//! players; a summary condenses it; an estimator computes the summary. No
//! async, no I/O: the engine takes a seed, a cap and a deadline and returns
//! values with their statistics.
//!
//! A request goes through two stages: [`prepare`] validates it against a
//! [`PreparedModel`] (derived once per registration) and plans it into a
//! [`Job`]; [`Job::run`] computes the [`Explanation`].

pub mod cancel;
pub mod coalition;
pub mod error;
pub mod estimate;
pub mod game;
pub mod job;
pub mod model;
pub mod plan;
pub mod players;
pub mod prepared;
pub mod removal;
pub mod summary;
pub mod target;
pub mod trees;

pub use cancel::CancelFlag;
pub use coalition::{Coalition, MAX_PLAYERS};
pub use error::{EngineError, ErrorKind, Result};
pub use estimate::{Estimate, EstimatorKind, Stopping};
pub use game::{CachedGame, FnGame, Game, ModelGame};
pub use job::{Explanation, Job, JobTemplate, RemovalChoice, Request, prepare, prepare_template};
pub use model::{LinearForm, Link, Model, Structure};
pub use players::Players;
pub use prepared::PreparedModel;
pub use removal::{Removal, RemovalKind};
pub use summary::{Kernel, Summary};
pub use target::Target;
pub use trees::{Tree, TreeEnsemble};
