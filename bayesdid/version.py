"""The package version (a module of its own, so that modules inside the package need not import
the package facade, bayesdid/__init__.py, which imports them)."""

__version__ = "0.1.0"
