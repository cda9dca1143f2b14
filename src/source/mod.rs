//! Finding new extracts and fetching their bytes: `folder` lists complete files in a folder,
//! `http` fetches a URL with conditional GET, limits and retries. Sources never parse and
//! never touch the store; what they return is handed to the ingest path.

pub mod folder;
pub mod http;
