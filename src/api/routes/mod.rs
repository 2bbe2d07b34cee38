//! One file per route.

pub mod distribution;
pub mod health;
pub mod layers;
pub mod quantiles;
pub mod tail;
