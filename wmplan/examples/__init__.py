"""Small complete examples of what users plug into wmplan (shown in the README and run by the tests)."""
