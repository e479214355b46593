//! Ensemble Kalman filter: the members and their forecast ([`members`]), the analysis
//! shared by both update forms ([`analysis`]), the perturbed-observations update
//! ([`perturbed`], Burgers et al. 1998), the ensemble transform ([`transform`], Bishop et
//! al. 2001, Hunt et al. 2007), and the buffers they work in ([`workspace`]).

mod analysis;
mod members;
mod perturbed;
mod transform;
mod workspace;

pub use members::Enkf;
