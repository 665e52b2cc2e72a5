"""upright: a headless physics sandbox for two-wheeled self-balancing robots."""


def __getattr__(name: str) -> str:
    # The version is looked up on first use: importlib.metadata costs start-up time.
    if name != "__version__":
        raise AttributeError(f"module 'sandbox' has no attribute {name!r}")
    from importlib.metadata import PackageNotFoundError, version

    global __version__
    try:
        __version__ = version("upright")
    except PackageNotFoundError:  # running from a source tree that is not installed
        __version__ = "0.0.0"
    return __version__
