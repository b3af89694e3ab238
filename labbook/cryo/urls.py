"""The cryostat pages, under /cryostats/."""

from django.urls import path

from labbook.cryo import views

app_name = "cryo"

urlpatterns = [
    path("", views.planner, name="planner"),
    path("plan.csv", views.plan_csv, name="plan_csv"),
    path("plan.ics", views.plan_ics, name="plan_ics"),
    path("<int:pk>/", views.cryostat_detail, name="cryostat"),
    path("<int:pk>/refills/", views.log_refill, name="log_refill"),
    path("<int:pk>/plot.png", views.plot, name="plot"),
    path("alerts/<int:pk>/acknowledge/", views.acknowledge, name="acknowledge"),
]
