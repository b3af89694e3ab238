from __future__ import annotations

from django.contrib.auth.middleware import LoginRequiredMiddleware


class LabLoginRequiredMiddleware(LoginRequiredMiddleware):
    """Every page needs a login, except the login page itself, the health probe and the API,
    which answers 401 with its own error format instead of redirecting a script to a form."""

    open_prefixes = ("/api/", "/healthz", "/static/")

    def process_view(self, request, view_func, view_args, view_kwargs):
        if request.path_info.startswith(self.open_prefixes):
            return None
        return super().process_view(request, view_func, view_args, view_kwargs)
