//! One file per route.

pub mod chart;
pub mod health;
pub mod page;
pub mod tail;
