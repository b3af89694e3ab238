from django.contrib import admin
from django.contrib.auth import views as auth_views
from django.urls import include, path

from labbook.accounts.views import ThrottledLoginView
from labbook.api import api
from labbook.core.views import healthz

urlpatterns = [
    path("healthz", healthz, name="healthz"),
    path("login/", ThrottledLoginView.as_view(), name="login"),
    path("logout/", auth_views.LogoutView.as_view(), name="logout"),
    path("admin/", admin.site.urls),
    path("api/v1/", api.urls),
    path("samples/", include("labbook.samples.urls")),
    path("instruments/", include("labbook.instruments.urls")),
    path("tips/", include("labbook.tips.urls")),
    path("logbook/", include("labbook.logbook.urls")),
    path("datasets/", include("labbook.datafiles.urls")),
    path("provenance/", include("labbook.provenance.urls")),
    path("changes/", include("labbook.provenance.audit_urls")),
    path("cryostats/", include("labbook.cryo.urls")),
    path("", include("labbook.web.urls")),
]
