"""The samples pages, under /samples/."""

from django.urls import path

from labbook.samples import views

app_name = "samples"

urlpatterns = [
    path("", views.sample_list, name="list"),
    path("<int:pk>/", views.sample_detail, name="sample"),
    path("log/", views.log_preparation, name="log"),
    # htmx parts of the log page; the page works without them.
    path("log/step/", views.log_step, name="log_step"),
    path("log/steps/", views.log_steps, name="log_steps"),
    path("log/choices/", views.log_choices, name="log_choices"),
    path("preparations/<int:pk>/", views.preparation_detail, name="preparation"),
]
