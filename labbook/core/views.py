from django.contrib.auth.decorators import login_not_required
from django.http import JsonResponse
from django.views.decorators.cache import never_cache
from django.views.decorators.http import require_GET

from labbook.core.health import service_health


@login_not_required
@never_cache
@require_GET
def healthz(request):
    status, body = service_health()
    return JsonResponse(body, status=status)
