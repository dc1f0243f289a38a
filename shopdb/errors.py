"""The one exception family a user sees as a clean message."""


class ShopdbError(Exception):
    """An error a user can act on; the CLI prints it as one line and exits 2."""


class NotFound(ShopdbError):
    """A named record does not exist."""


class PermissionDenied(ShopdbError):
    """The signed-in user's role does not allow the action."""
