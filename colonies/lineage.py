"""A tank's culture line (ancestors, descendants and their relatives) as rows for the lineage page."""
from .models import SplitPart, Tank


def lineage_rows(tank: Tank) -> tuple[list[dict], int]:
    """The culture line of `tank` as a depth-first list of rows (depth, tank, how it was founded).

    Three queries whatever the size of the line: all lineage edges, the tanks of this line, and
    the splits that link them. The tree is built in Python. A tank founded from two parents
    appears under both; the second time it is marked as already shown.
    """
    edges = list(Tank.founded_from.through.objects.values_list("from_tank_id", "to_tank_id"))  # (child, parent)
    parents: dict[int, set[int]] = {}
    children: dict[int, set[int]] = {}
    for child, parent in edges:
        parents.setdefault(child, set()).add(parent)
        children.setdefault(parent, set()).add(child)
    line, todo = set(), [tank.pk]
    while todo:  # the connected component: ancestors, descendants and their relatives
        pk = todo.pop()
        if pk in line:
            continue
        line.add(pk)
        todo.extend(parents.get(pk, ()))
        todo.extend(children.get(pk, ()))
    tanks = Tank.objects.select_related("room", "species").in_bulk(line)
    links: dict[tuple[int, int], list] = {}
    for source_id, dest_id, at, animals, created in (
            SplitPart.objects.filter(split__voided_at__isnull=True, destination_id__in=line)
            .values_list("split__source_id", "destination_id", "split__split_at", "animals", "created_tank")):
        links.setdefault((dest_id, source_id), []).append({"at": at, "animals": animals, "created": created})
    roots = sorted((pk for pk in line if not parents.get(pk, set()) & line),
                   key=lambda pk: (tanks[pk].started_on, tanks[pk].code))
    rows, shown = [], set()

    def walk(pk, depth, parent):
        repeat = pk in shown
        rows.append({"tank": tanks[pk], "depth": depth, "indent": depth * 1.6, "parent": tanks.get(parent),
                     "splits": sorted(links.get((pk, parent), []), key=lambda s: s["at"]), "repeat": repeat,
                     "current": pk == tank.pk})
        if repeat:
            return
        shown.add(pk)
        for child in sorted(children.get(pk, ()), key=lambda c: (tanks[c].started_on, tanks[c].code)):
            if child in line:
                walk(child, depth + 1, pk)

    for root in roots:
        walk(root, 0, None)
    for pk in sorted(line - shown, key=lambda pk: tanks[pk].code):  # only in a (mistaken) lineage cycle
        if pk not in shown:
            walk(pk, 0, None)
    return rows, len(line)

