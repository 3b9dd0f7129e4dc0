//! The numeric core: removal ∘ model ∘ target defines a cooperative game over
//! players; a summary condenses it; an estimator computes the summary. No
//! async, no I/O: the engine takes a seed, a cap and a deadline and returns
//! values with their statistics.

pub mod coalition;
pub mod error;
pub mod estimate;
pub mod explain;
pub mod game;
pub mod plan;
pub mod players;
pub mod removal;
pub mod summary;
pub mod target;

pub use coalition::{Coalition, MAX_PLAYERS};
pub use error::{EngineError, Result};
pub use estimate::{Estimate, EstimatorKind, Stopping};
pub use explain::{Explanation, RemovalChoice, Request, Subject, explain};
pub use game::{CachedGame, FnGame, Game, ModelGame};
pub use players::Players;
pub use removal::{Removal, RemovalKind};
pub use summary::{Kernel, Summary};
pub use target::Target;
