"""The pages of people, groups and API tokens; the login form with its failure throttle."""

from __future__ import annotations

from django.contrib.auth import views as auth_views
from django.http import HttpRequest, HttpResponse

from labbook.accounts import throttle


class ThrottledLoginView(auth_views.LoginView):
    """Django's login form, refusing attempts (HTTP 429, the form with a message naming the
    wait) once a username or an address has failed too often (``accounts.throttle``)."""

    def post(self, request: HttpRequest, *args, **kwargs) -> HttpResponse:
        username = str(request.POST.get("username", ""))
        address = throttle.client_address(request)
        refused = throttle.refusal(username, address)
        if refused is not None:
            # Refused before the password is checked: a guess during the cooldown tells nothing.
            return self._refuse(refused)
        return super().post(request, *args, **kwargs)

    def form_valid(self, form) -> HttpResponse:
        throttle.record_success(form.get_user().get_username())
        return super().form_valid(form)

    def form_invalid(self, form) -> HttpResponse:
        username = str(self.request.POST.get("username", ""))
        started = throttle.record_failure(username, throttle.client_address(self.request))
        if started is not None:
            return self._refuse(started)
        return super().form_invalid(form)

    def _refuse(self, refused: throttle.Refusal) -> HttpResponse:
        form = self.get_form_class()(self.request, data=None)
        form.initial = {"username": self.request.POST.get("username", "")}
        # A field error, so the page shows this message instead of "do not match".
        form.errors["username"] = form.error_class([refused.message])
        response = self.render_to_response(self.get_context_data(form=form))
        response.status_code = 429
        response["Retry-After"] = str(refused.retry_after_s)
        return response
