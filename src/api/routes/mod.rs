//! One file per route.

pub mod health;
pub mod tail;
