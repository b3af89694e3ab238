"""The JSON API router of acquired files: storage, readers, ingestion, thumbnails and statistics.
"""
