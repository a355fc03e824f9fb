//! mnemon's networks on candle (CPU): the parts a spec names (torso, memory, head), the
//! assembled [`Network`] the learner unrolls, the allocation-light [`ActorNet`] that
//! actors step, the losses of the published methods ([`loss`]), the Adam optimizer with
//! global gradient-norm clipping ([`optim`]) and safetensors checkpoints ([`checkpoint`]).
//!
//! The LSTM recurrence runs as one fused candle custom op with a hand-written backward
//! pass ([`lstm`]); see `PERFORMANCE.md` for why. Thread use is explicit: see
//! [`threads`].

#![deny(missing_docs)]

pub mod actor;
pub mod affine;
pub mod bench;
pub mod checkpoint;
pub mod conv;
pub mod error;
pub mod fastmath;
pub mod loss;
pub mod lstm;
pub mod network;
pub mod optim;
mod raw;
pub mod threads;

pub use actor::ActorNet;
pub use error::{Error, Result};
pub use network::{NetShape, Network, ObsShape, Params, UnrollInput, UnrollOutput};
pub use optim::Optimizer;
