//! Model identification from recorded series: the numerical kernels behind
//! `POST /v1/identify`. Each kernel takes plain matrices (rows are samples, or for
//! `reduced` columns are snapshots), a [`Stop`](crate::model::Stop) for the deadline
//! and cancel flag, and returns a fit or an [`IdentifyError`]: a refusal that names the
//! request field at fault, or the halt that stopped it. Each fit has a function that
//! writes it as a v1 model section (discrete `linear` dynamics, process noise and
//! sensors) that `/v1/estimate` accepts.
//!
//! - [`subspace`]: a linear state-space model in innovation form from input and output
//!   series (N4SID oblique projection, Van Overschee & De Moor 1994).
//! - [`reduced`]: a rank-r linear model over a few mode amplitudes from many-state
//!   snapshots (dynamic mode decomposition, Schmid 2010; Tu et al. 2014).

pub mod reduced;
pub mod refusal;
pub mod section;
pub mod subspace;

pub use refusal::{IdentifyError, IdentifyRefusal};
