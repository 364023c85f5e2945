//! The path every event takes, shared by the service, the backfill and the evaluation:
//! decoded events applied in batches and written to the store (`batch`), then the lists
//! of the items they changed rescored and published (`publish`).

pub mod batch;
pub mod publish;
