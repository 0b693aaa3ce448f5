"""The error tree drawn in errors.py's docstring is the tree the module defines."""

import inspect

import watchdog_edge.errors as errors


def test_every_error_class_is_drawn_in_the_tree_under_the_base():
    classes = {n: c for n, c in vars(errors).items() if inspect.isclass(c) and issubclass(c, Exception)}
    # nested branches too ("│   └── Child")
    drawn = {
        line.split("── ")[1].split()[0] for line in errors.__doc__.splitlines() if "├── " in line or "└── " in line
    }
    assert drawn == set(classes) - {"WatchdogError"}
    assert all(issubclass(c, errors.WatchdogError) for c in classes.values())
