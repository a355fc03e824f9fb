//! The named seed streams of a run. Every random stream of training is
//! `episode_seed(run seed, stream, index)` for one of the stream tags below (or, for
//! evaluation's exploration, the evaluation seed xor a tag). The values are part of
//! reproducibility: changing one changes every run's numbers, so they never change.

/// Episodes of the greedy evaluations during training (index 0).
pub const EVALUATION: u64 = 0xE7A1;
/// Xored into an evaluation's seed for its exploration stream (used when epsilon > 0).
pub const EVALUATION_EXPLORATION: u64 = 0x5EED_E7A1;
/// An actor's exploration stream of one round (index: the round), derived from the
/// actor's own seed, so a resumed run explores as the original did.
pub const ACTOR_ROUND: u64 = 0xAC70;
/// The learner's replay sampling (index: learner updates so far).
pub const LEARNER_SAMPLING: u64 = 0x1EA2;
/// The lanes of actor `a` use stream `ACTOR_LANES + a` (index: rounds so far, so a
/// resumed run's lanes start from a fresh stream).
pub const ACTOR_LANES: u64 = 1000;
/// Actor `a`'s exploration seed is stream `ACTOR_EXPLORATION + a` (index 0).
pub const ACTOR_EXPLORATION: u64 = 2000;
