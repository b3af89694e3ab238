from django.shortcuts import render

from labbook.accounts.permissions import lab_member_required
from labbook.web.queries import dashboard_summary


@lab_member_required
def dashboard(request):
    return render(request, "web/dashboard.html", dashboard_summary())
