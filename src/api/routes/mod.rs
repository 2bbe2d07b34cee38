//! One file per route.

pub mod batch;
pub mod chart;
pub mod contributions;
pub mod distribution;
pub mod docs;
pub mod health;
pub mod layers;
pub mod metrics;
pub mod page;
pub mod quantiles;
pub mod tail;
