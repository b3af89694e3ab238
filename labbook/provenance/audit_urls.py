"""The change log and the tip audit, under /changes/."""

from django.urls import path

from labbook.provenance import audit_views

app_name = "audit"

urlpatterns = [
    path("", audit_views.change_log, name="log"),
    path("tips/", audit_views.tips_of_datasets, name="tips_of_files"),
    path("tips/<int:pk>/", audit_views.tip_audit, name="tip"),
]
