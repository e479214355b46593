//! Time propagation between readings: matrix exponential, exact discretisation of linear
//! continuous models (Van Loan), an adaptive embedded Runge–Kutta integrator, and the
//! fixed classical Runge–Kutta step of family models (issue 13).

mod expm;
mod family_rk4;
mod ode;
mod van_loan;

pub use expm::Expm;
pub use family_rk4::{FamilyRates, FamilyRk4, MAX_FAMILY_ARRAYS};
pub use ode::{first_non_finite, past_deadline, Dopri5, OdeError, OdeStats, DEADLINE_EVERY};
pub use van_loan::{Discrete, Discretiser};
