from django.shortcuts import render
from django.utils import timezone

from labbook.accounts.permissions import lab_member_required
from labbook.cryo.queries import dashboard_panel
from labbook.web.queries import dashboard_summary


@lab_member_required
def dashboard(request):
    context = dashboard_summary()
    # The cryogen panel: next refills and open alerts (labbook.cryo composes it).
    context["cryo"] = dashboard_panel(context.get("now") or timezone.now())
    return render(request, "web/dashboard.html", context)
