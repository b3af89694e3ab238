"""Read-side queries of acquired files: storage, readers, ingestion, thumbnails and statistics;
other apps read through these.
"""
