//! vitrine-service
