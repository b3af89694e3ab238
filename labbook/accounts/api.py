from __future__ import annotations

from ninja import Router, Schema

from labbook.accounts.permissions import is_manager

router = Router(tags=["accounts"])


class WhoAmI(Schema):
    username: str
    manager: bool
    token_instrument: int | None
    token_read_only: bool


@router.get("/me", response=WhoAmI)
def who_am_i(request):
    """Who the API sees: useful to check a token before wiring it into a logger."""
    access = request.auth
    return {
        "username": access.user.get_username(),
        "manager": is_manager(access.user),
        "token_instrument": access.instrument_id,
        "token_read_only": access.read_only,
    }
