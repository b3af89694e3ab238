"""The tip pages, under /tips/."""

from django.urls import path

from labbook.tips import views

app_name = "tips"

urlpatterns = [
    path("", views.tip_list, name="list"),
    path("<int:pk>/", views.tip_detail, name="tip"),
    path("<int:pk>/mount/", views.mount, name="mount"),
    path("<int:pk>/unmount/", views.unmount, name="unmount"),
    path("<int:pk>/conditioning/", views.log_conditioning, name="conditioning"),
]
