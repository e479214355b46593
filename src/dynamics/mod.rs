//! Time propagation between readings: matrix exponential, exact discretisation of linear
//! continuous models (Van Loan), and an adaptive embedded Runge–Kutta integrator.

mod dense;
mod expm;
mod ode;
mod van_loan;

pub use expm::Expm;
pub use ode::{Dopri5, OdeError, OdeStats};
pub use van_loan::{Discrete, Discretiser};
