//! One file per route.

pub mod chart;
pub mod distribution;
pub mod health;
pub mod layers;
pub mod page;
pub mod quantiles;
pub mod tail;
