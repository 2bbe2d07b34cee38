//! tailtally: tail probabilities, quantiles and the whole law of a count of independent events.
//!
//! The count S is a sum of independent parts: Bernoulli exposures with their own probabilities (the
//! Poisson-binomial law), blocks of identical exposures (binomial) and Poisson sources. A request walks down
//! once and back up once: `api` (decode, call, encode) -> `analytics` (the scenario, the law, each question)
//! -> `engine` (the methods and their numerics) and `portfolio` (the model). `server` assembles the service;
//! `config` and `telemetry` serve every layer.
//!
//! Guarantees of each method are stated in its module; every estimate carries an error bound and says whether
//! that bound is rigorous or estimated.
//!
//! Assumption: the parts are independent. Results support, and do not replace, the judgement of a qualified
//! actuary or engineer and the rules of local regulation.

pub mod analytics;
pub mod api;
pub mod config;
pub mod engine;
pub mod portfolio;
pub mod server;
pub mod telemetry;
