//! Time propagation between readings: matrix exponential, exact discretisation of linear
//! continuous models (Van Loan), and an adaptive embedded Runge–Kutta integrator.

mod expm;
mod ode;
mod van_loan;

pub use expm::Expm;
pub use ode::{first_non_finite, past_deadline, Dopri5, OdeError, OdeStats, DEADLINE_EVERY};
pub use van_loan::{Discrete, Discretiser};
