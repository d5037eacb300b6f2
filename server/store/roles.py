"""The office's roles, in a module of their own: the command line lists them in its help
without importing the accounts (argon2) or the store."""

#: The roles, least to most trusted in projects; the administrator manages accounts only.
ROLES = ("viewer", "technician", "surveyor", "administrator")
#: How the pages name each role.
ROLE_TITLES = {
    "viewer": "viewer",
    "technician": "technician",
    "surveyor": "surveyor in responsible charge",
    "administrator": "administrator",
}

__all__ = ["ROLES", "ROLE_TITLES"]
