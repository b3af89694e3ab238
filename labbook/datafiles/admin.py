"""Admin (setup) pages of acquired files: storage, readers, ingestion, thumbnails and statistics."""
