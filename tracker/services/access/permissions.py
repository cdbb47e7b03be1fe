"""What each role may do, as data, and the one check every command and page goes through.

Roles (``tracker.domain.vocabulary.USER_ROLES``): a *viewer* reads; a *clinician* reads, enters and imports
studies, annotates and evaluates; a *research coordinator* exports (identified only with this role or admin)
and, on the dashboard, sees export ids instead of patient codes; an *admin* manages accounts, normal-limit
sets, settings, backups and restores. Nobody changes their own role (:mod:`.accounts`).

*Single-user mode*: while the users table is empty, whoever can open the database acts with every permission
except the two that need a named account: identified export and account management (``users init`` creates
the first admin and ends single-user mode). Once accounts exist, a login without an active account reads only.
"""

from __future__ import annotations

from dataclasses import dataclass

from tracker.errors import TrackerError

ALL_ROLES = ("viewer", "clinician", "coordinator", "admin")
PERMISSIONS: dict[str, tuple[str, ...]] = {
    "read": ALL_ROLES,
    "see_patient_codes": ("viewer", "clinician", "admin"),
    "write_clinical": ("clinician", "admin"),
    "read_audit": ("clinician", "admin"),
    "export": ("clinician", "coordinator", "admin"),
    # A bulk identified file is a disclosure: the coordinator (under a study approval) and the admin.
    "export_identified": ("coordinator", "admin"),
    "manage_users": ("admin",),
    "change_own_password": ALL_ROLES,
    "limits": ("admin",),
    "settings": ("admin",),
    "backup": ("admin",),
    "restore": ("admin",),
}
# Permissions that need a named account even in single-user mode.
NEED_ACCOUNT = frozenset({"export_identified", "manage_users", "change_own_password"})
# Privileged actions: on the command line the acting login must prove itself with its password, and a
# ``--user`` naming someone else is refused.
PRIVILEGED = frozenset(
    {"export_identified", "manage_users", "change_own_password", "limits", "settings", "backup", "restore"}
)
# Read by anyone who can open the database when they have no account (or an inactive one).
WITHOUT_ACCOUNT = frozenset({"read", "see_patient_codes"})

PERMISSION_WORDS = {
    "read": "read patient records",
    "see_patient_codes": "see patient codes",
    "write_clinical": "enter, import or annotate studies",
    "read_audit": "read the audit trail",
    "export": "export research tables",
    "export_identified": "receive an identified export",
    "manage_users": "manage accounts and roles",
    "change_own_password": "change a password",
    "limits": "import normal-limit sets or choose the default set",
    "settings": "change the database's settings",
    "backup": "back up the database",
    "restore": "restore the database from a backup",
}


class NotPermitted(TrackerError):
    """The acting user may not do this (exit code 1, DESIGN.md §5)."""


@dataclass(frozen=True)
class Actor:
    """Who is acting and how we know.

    ``via``: ``"os-login"`` (SQLite command line), ``"database-login"`` (PostgreSQL ``current_user``),
    ``"sign-in"`` (dashboard), ``"single-user"`` (no accounts yet). ``role`` is ``None`` without an active
    account. ``authenticated`` is true once a password was checked in this process or session.
    """

    name: str
    role: str | None
    via: str
    authenticated: bool = False

    @property
    def single_user(self) -> bool:
        return self.via == "single-user"

    def may(self, permission: str) -> bool:
        if permission not in PERMISSIONS:
            raise KeyError(permission)
        if self.single_user:
            return permission not in NEED_ACCOUNT
        if self.role is None:
            return permission in WITHOUT_ACCOUNT
        return self.role in PERMISSIONS[permission]

    def require(self, permission: str) -> Actor:
        """Return ``self`` if allowed, else raise :class:`NotPermitted` saying which roles may."""
        if self.may(permission):
            return self
        words = PERMISSION_WORDS[permission]
        roles = " or ".join(PERMISSIONS[permission])
        if self.single_user:
            raise NotPermitted(
                f"To {words} this database needs accounts: create the first administrator with "
                "'ncs-tracker users init' (it ends single-user mode)."
            )
        held = f"role {self.role}" if self.role else "no active account in this database"
        raise NotPermitted(
            f"{self.name} may not {words}: it needs the role {roles}, and {self.name} has {held}."
        )
