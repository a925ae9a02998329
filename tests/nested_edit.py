"""Test helper: a deep copy of a nested system-file mapping with one key replaced or removed."""
from __future__ import annotations

import copy


def edited(data: dict, keys, value):
    """Copy of ``data`` with ``data[k0][k1]…[kn] = value``; ``value=KeyError`` deletes that key."""
    data = copy.deepcopy(data)
    node = data
    for k in keys[:-1]:
        node = node[k]
    if value is KeyError:
        del node[keys[-1]]
    else:
        node[keys[-1]] = value
    return data
