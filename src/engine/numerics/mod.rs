//! Numerical tools the methods share: the floating-point model and compensated sums (`float`), one-pass
//! moments (`moments`), the cumulant generating function and the tilt (`cgf`), the standard normal law
//! (`normal_law`), Gauss-Hermite rules (`quadrature`) and adaptive Gauss-Kronrod expectations over a normal
//! factor (`mixture`).

pub mod cgf;
pub mod float;
pub mod mixture;
pub mod moments;
pub mod normal_law;
pub mod quadrature;
