//! Ensemble Kalman filter: the members and their forecast (`members.rs`), the analysis
//! shared by both update forms (`analysis.rs`), the perturbed-observations update
//! (`perturbed.rs`, Burgers et al. 1998), the ensemble transform (`transform.rs`, Bishop
//! et al. 2001, Hunt et al. 2007), the rebuild of members whose spread rounding took away
//! (`spread.rs`), the estimated parameters' spread relaxation and bounds (`relax.rs`,
//! Whitaker & Hamill 2012), the buffers they work in (`workspace.rs`), and for family
//! models (issue 13) the localised transform (`local.rs`, Hunt et al. 2007, Gaspari & Cohn
//! 1999) and the ensemble that forecasts and analyses with it in parallel (`family.rs`).

mod analysis;
mod family;
mod local;
mod members;
mod perturbed;
mod relax;
mod spread;
mod transform;
mod workspace;

pub use family::FamilyEnsemble;
pub use local::{gaspari_cohn, LocalReadings, LocalSettings, LocalTransform};
pub use members::Enkf;
