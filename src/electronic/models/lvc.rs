//! LVC models. Placeholder.
pub struct Lvc;
