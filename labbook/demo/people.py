"""The demo lab's people: a lab manager, three members and one outsider.

All names are invented (DESIGN.md §5); the e-mail domain is ``example.org``, which is reserved
for examples and never delivers mail.
"""

from __future__ import annotations

from dataclasses import dataclass

from django.contrib.auth import get_user_model
from django.db import transaction

from labbook.accounts.actions import set_role
from labbook.demo import DemoContext

# Published on purpose: anyone reading the README can log in to the demo. Demo data only —
# the command refuses to add these accounts to a database that holds other people.
DEMO_PASSWORD = "labbook-demo"  # noqa: S105
DEMO_EMAIL_DOMAIN = "example.org"


@dataclass(frozen=True)
class Person:
    username: str
    first_name: str
    last_name: str
    role: str  # "manager", "member" or "outsider" (accounts.actions.set_role)
    title: str  # what they do, for the login hint

    @property
    def email(self) -> str:
        return f"{self.first_name}.{self.last_name}@{DEMO_EMAIL_DOMAIN}".lower()


PEOPLE: tuple[Person, ...] = (
    Person("greta", "Greta", "Lindholm", "manager", "lab manager"),
    Person("amira", "Amira", "Haddad", "member", "postdoc"),
    Person("jonas", "Jonas", "Wendland", "member", "PhD student"),
    Person("leo", "Leo", "Castellano", "member", "PhD student"),
    # Logged in but in neither lab group: shows what an outsider may not see.
    Person("nadia", "Nadia", "Ferreira", "outsider", "from the group next door"),
)
MANAGER = PEOPLE[0]
USERNAMES = frozenset(person.username for person in PEOPLE)


@transaction.atomic
def ensure_people(ctx: DemoContext) -> dict[str, int]:
    """Get or create each demo account by username and give it its demo role.

    The password is set only when an account is created: a re-run does not undo a password
    someone changed on purpose (and PBKDF2 is deliberately slow, so it also saves seconds).
    """
    user_model = get_user_model()
    created = 0
    for person in PEOPLE:
        user, is_new = user_model.objects.get_or_create(
            username=person.username,
            defaults={
                "first_name": person.first_name,
                "last_name": person.last_name,
                "email": person.email,
            },
        )
        if is_new:
            user.set_password(DEMO_PASSWORD)
            user.save(update_fields=["password"])
            created += 1
        set_role(user, person.role)
        ctx.users[person.username] = user
    ctx.manager = ctx.users[MANAGER.username]
    ctx.report(f"people: {len(PEOPLE)} accounts ({created} new)")
    return {"users": len(PEOPLE)}
