"""The spectrum plot of a dataset page: ``/datasets/<pk>/spectrum.png``.

The page links it as ``?v=<version>``, a version that changes whenever the traces are stored
again (see :func:`plot_version`); a request carrying the current version may be kept by the
browser for a year, since that URL will never show another picture. Any other request (no
version, or an old page's) is kept an hour, as before versions existed.
"""

from __future__ import annotations

from django.http import Http404, HttpRequest, HttpResponse, HttpResponseBadRequest
from django.shortcuts import get_object_or_404
from django.urls import reverse
from django.utils import dateformat
from django.utils.cache import patch_cache_control
from django.utils.http import urlencode
from django.views.decorators.http import require_GET

from labbook.accounts.permissions import lab_member_required
from labbook.datafiles import queries, spectrum_plots
from labbook.datafiles.models import AcquiredFile

#: How long a browser keeps the picture of an unversioned (or outdated) URL.
UNVERSIONED_CACHE_S = 3600
#: How long it keeps the picture of the current versioned URL, marked "immutable" (RFC 8246):
#: a year, the longest lifetime RFC 2616 section 14.21 let a server give.
VERSIONED_CACHE_S = 365 * 24 * 3600


def plot_version(record: AcquiredFile) -> str:
    """The ``v`` the dataset page puts on the plot's URL: the drawing's style version, then
    when the traces were stored, in microseconds since 1970 (the template's ``date:"Uu"``).
    Processing stores the stats and stamps ``processed_at`` in the same save, so new traces
    always come with a new version; "" for a record never processed."""
    if record.processed_at is None:
        return ""
    return f"{spectrum_plots.STYLE_VERSION}-{dateformat.format(record.processed_at, 'Uu')}"


def plot_url(record: AcquiredFile) -> str:
    """The plot's URL as the dataset page links it: with :func:`plot_version`, so a dataset
    processed again shows its new plot at once."""
    url = reverse("datafiles:spectrum_plot", args=[record.pk])
    version = plot_version(record)
    return f"{url}?{urlencode({'v': version})}" if version else url


@lab_member_required
@require_GET
def spectrum_plot(request: HttpRequest, pk: int) -> HttpResponse:
    """The stored traces of a spectrum (or a grid's mean spectrum) as a PNG; ``?scale=2`` for
    a high-density screen. 404 when the dataset has no traces (an image, a file not read)."""
    record = get_object_or_404(queries.files().only("pk", "sha256", "stats", "processed_at"), pk=pk)
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
    # file change only if it is processed again; then the page links a new version, so the
    # current version's picture can be kept a year. Without it (or with an old page's,
    # which shows today's traces under yesterday's URL), an hour.
    version = plot_version(record)
    if version and request.GET.get("v") == version:
        patch_cache_control(response, private=True, max_age=VERSIONED_CACHE_S, immutable=True)
    else:
        patch_cache_control(response, private=True, max_age=UNVERSIONED_CACHE_S)
    return response
