"""The pages of provenance, under /provenance/: crates of chosen datasets (a figure's), built
by a background job and followed on their own page."""

from django.urls import path

from labbook.provenance import export_views

app_name = "provenance"

urlpatterns = [
    path("crates/new/", export_views.crate_new, name="crate_new"),
    path("crates/<int:job_id>/", export_views.crate_page, name="crate"),
    # htmx part of the crate page: how far the worker is.
    path("crates/<int:job_id>/progress/", export_views.crate_progress, name="crate_progress"),
    path("crates/<int:job_id>/download/", export_views.crate_download, name="crate_download"),
]
