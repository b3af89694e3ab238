from django.urls import path

from labbook.web import views

urlpatterns = [
    path("", views.dashboard, name="dashboard"),
]
