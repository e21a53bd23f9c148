//! Files in and out: the CSV reader, the model card beside each blob, atomic output, and the
//! invented demo scenario.

pub mod card;
pub mod ingest;
pub mod output;
pub mod paths;
pub mod scenario;
