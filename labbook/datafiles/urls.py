"""The dataset pages, under /datasets/."""

from django.urls import path

from labbook.datafiles import spectrum_views, views

app_name = "datafiles"

urlpatterns = [
    path("", views.search, name="search"),
    path("upload/", views.upload, name="upload"),
    path("integrity/", views.integrity, name="integrity"),
    # htmx parts of the upload page: a row that follows its file, the batch's progress.
    path("upload/progress/", views.progress_part, name="progress"),
    path("<int:pk>/row/", views.row_part, name="row"),
    path("<int:pk>/", views.dataset, name="dataset"),
    path("<int:pk>/correct/", views.correct, name="correct"),
    # The stored traces of a spectrum, drawn (labbook.datafiles.spectrum_plots).
    path("<int:pk>/spectrum.png", spectrum_views.spectrum_plot, name="spectrum_plot"),
]
