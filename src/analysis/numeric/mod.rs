//! Numerical building blocks shared by the analyses: dense linear algebra and Cholesky
//! (`linalg`), penalised Newton minimisation (`newton`, used by the smooth nowcast), and
//! derivative-free optimisers on a box (`simplex`, used by the delay fits). Pure and
//! deterministic.

pub(crate) mod linalg;
pub(crate) mod newton;
pub(crate) mod simplex;
