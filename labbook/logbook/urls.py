"""The logbook pages, under /logbook/."""

from django.urls import path

from labbook.logbook import views

app_name = "logbook"

urlpatterns = [
    path("", views.logbook_index, name="index"),
    path("note/", views.note, name="note"),
    path("<int:instrument_id>/", views.logbook_page, name="instrument"),
    # htmx part of the logbook page: a page of entries ("load older").
    path("<int:instrument_id>/entries/", views.entries_part, name="entries"),
    path("<int:instrument_id>/sessions/", views.start_session, name="start_session"),
    path("sessions/<int:pk>/end/", views.end_session, name="end_session"),
]
