"""The spectrum plot of a dataset page: ``/datasets/<pk>/spectrum.png``."""

from __future__ import annotations

from django.http import Http404, HttpRequest, HttpResponse, HttpResponseBadRequest
from django.shortcuts import get_object_or_404
from django.utils.cache import patch_cache_control
from django.views.decorators.http import require_GET

from labbook.accounts.permissions import lab_member_required
from labbook.datafiles import queries, spectrum_plots


@lab_member_required
@require_GET
def spectrum_plot(request: HttpRequest, pk: int) -> HttpResponse:
    """The stored traces of a spectrum (or a grid's mean spectrum) as a PNG; ``?scale=2`` for
    a high-density screen. 404 when the dataset has no traces (an image, a file not read)."""
    record = get_object_or_404(queries.files().only("pk", "sha256", "stats"), pk=pk)
    scale_text = request.GET.get("scale", "1")
    if scale_text not in ("1", "2", "3"):
        return HttpResponseBadRequest(
            "scale is 1, 2 or 3", content_type="text/plain; charset=utf-8"
        )
    png = spectrum_plots.spectrum_plot_png(record, scale=int(scale_text))
    if png is None:
        raise Http404("this dataset has no stored spectrum traces")
    response = HttpResponse(png, content_type="image/png")
    # Private: lab data behind a login, never for a shared proxy. The traces of a stored
    # file change only if it is processed again, which the page's next URL does not show,
    # so an hour rather than for ever.
    patch_cache_control(response, private=True, max_age=3600)
    return response
