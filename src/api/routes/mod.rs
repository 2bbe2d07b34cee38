//! One file per route.

pub mod docs;
pub mod health;
pub mod metrics;
pub mod tail;
