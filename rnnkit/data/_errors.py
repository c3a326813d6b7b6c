"""The one error type of our own: bad data the user can fix."""


class DataError(ValueError):
    """The data cannot be used as given; the message names the column, the row and the fix."""


class SmallPartWarning(UserWarning):
    """A validation or test part holds so few windows that its scores are noisy."""
