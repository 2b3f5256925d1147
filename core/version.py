"""The installed Trialdesk version, printed on every report."""

from importlib.metadata import PackageNotFoundError, version

try:
    VERSION = version("trialdesk")
except PackageNotFoundError:  # running from a source tree that was never installed
    VERSION = "0+unknown"
