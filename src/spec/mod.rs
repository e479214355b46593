//! Request specifications: JSON in, checked types out. Parsing happens in two stages, the
//! raw JSON sections (`request`, `reader`, `reading`) and one validation step (`validate`)
//! producing the checked [`model`] types that the filters consume.

pub mod model;
pub mod reader;
pub mod reading;
pub mod request;
pub mod time;
pub mod validate;
