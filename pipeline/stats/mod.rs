//! Statistics: linear mixed models with Satterthwaite tests ([`lmm`]),
//! inference helpers ([`infer`]) and reading tables for re-analysis
//! ([`design`]).

pub mod agreement;
pub mod design;
pub mod epoch_model;
pub mod infer;
pub mod lmm;
pub mod summary;
