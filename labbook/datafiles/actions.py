"""Every state change of acquired files: storage, readers, ingestion, thumbnails and statistics:
the one path views, API, tasks and commands call.
"""
