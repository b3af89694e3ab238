"""The instrument pages, under /instruments/."""

from django.urls import path

from labbook.instruments import views

app_name = "instruments"

urlpatterns = [
    path("", views.instrument_list, name="list"),
    path("<int:pk>/", views.instrument_detail, name="instrument"),
    # htmx part of the instrument page: the state table, refreshed every 30 s.
    path("<int:pk>/state/", views.state_part, name="state"),
    path("<int:pk>/events/", views.log_event, name="log_event"),
    path("<int:pk>/channels/<int:channel_id>/plot.png", views.channel_plot, name="plot"),
    path("events/<int:pk>/", views.event_detail, name="event"),
]
