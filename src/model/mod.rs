//! The checked types the filters consume: the plant model, the run settings, reading times
//! and parsed measurement lines. They are built only by [`crate::request`], so every value
//! here has passed validation once and the filters never re-check it.

mod family;
mod plant;
mod reading;
mod settings;
mod stop;
pub mod time;

pub use family::{FamilyModel, FamilySensor};
pub use plant::*;
pub use reading::Reading;
pub use settings::*;
pub use stop::{Halt, Stop};
pub use time::{Instant, Suffix, TimeMode, Zone};
