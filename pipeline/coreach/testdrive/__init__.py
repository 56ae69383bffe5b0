"""Test drive in the browser: a person drives a release bundle's runtime Session on a simulated arm."""
