from django.conf import settings

from labbook.accounts.permissions import is_lab_member, is_manager


def lab(request) -> dict:
    user = getattr(request, "user", None)
    return {
        "lab_name": settings.LABBOOK_NAME,
        "lab_time_zone": settings.TIME_ZONE,
        "is_lab_member": bool(user) and is_lab_member(user),
        "is_manager": bool(user) and is_manager(user),
    }
