"""The plugin host: the protocols plugins implement, the registry that finds them, the contract checks, and
the small public API plugins may import (coreach.host.api)."""
