"""SearchJobs: Archive's search (mixed into index.api.Archive, like the duplicate and map rooms' jobs).

One or several query examples, like/unlike marks (Rocchio's rule, index.search.feedback), query
expansion (alpha-QE, same module), on one layer or several layers combined (index.search.combined).
The methods use what Archive provides: catalog, store(), item(), query_image(), embedder, whitening(),
manifest and layer_names. See docs/retrieval.md.
"""
from __future__ import annotations

import os

import numpy as np

from ..common.errors import ArchiveError
from . import feedback as fb
from .combined import COMBINED, layer_weights, ranked
from .nearest import nearest, row_filter


class SearchJobs:
    """Archive's search methods."""

    def search(self, query, *, layer=None, k: int = 10, box=None, offset: int = 0, folder: str | None = None,
               date_from: str | None = None, date_to: str | None = None, like=(), unlike=(),
               expand: int = 0) -> dict:
        """Items most similar to the query, best first; score = cosine similarity of descriptors.

        query: one example (a catalog id, a file path, image bytes or a PIL image) or a list of them;
        `like` and `unlike`: more of them, marked "more like this" / "not like this". Several are combined
        by Rocchio's rule (index.search.feedback); example ids are left out of the results. `box` crops the
        first example only. `expand` N > 0: alpha query expansion with the N best results.
        layer: a layer's name, "combined" (several layers' similarities with weights, index.search.combined),
        or a dict {layer: weight}; None is the archive's default layer.
        `folder` keeps items below that folder; `date_from`/`date_to` ('YYYY-MM-DD') filter on the
        capture date, else the file date; `offset` pages through the ranking.
        """
        for label, value, least, what in (("k", k, 1, "positive"), ("offset", offset, 0, "non-negative"),
                                          ("expand", expand, 0, "non-negative")):
            if not isinstance(value, (int, np.integer)) or value < least:
                raise ArchiveError(f"{label} must be a {what} whole number, got {value!r}")
        if expand > fb.MAX_EXPAND:
            raise ArchiveError(f"expand takes at most {fb.MAX_EXPAND} results, got {expand}")
        examples = list(query) if isinstance(query, (list, tuple)) else [query]
        like, unlike = list(like or ()), list(unlike or ())
        if not examples:
            raise ArchiveError("give at least one query example (an image or an indexed item)")
        try:
            weights = layer_weights(layer, self.layer_names, self.manifest["default_layer"])
            accept = row_filter(folder, date_from, date_to)
        except ValueError as exc:
            raise ArchiveError(str(exc)) from None
        names = [self._layer(n)["name"] for n in weights]  # a node name given for a layer -> its name
        weights = dict(zip(names, weights.values()))
        groups = [[self.query_vectors(q, names, box if i == 0 and g == 0 else None) for i, q in enumerate(qs)]
                  for g, qs in enumerate((examples, like, unlike))]
        queries = {n: fb.rocchio(*[np.array([v[n] for v in grp]) if grp else None for grp in groups]) for n in names}
        exclude = {int(q) for q in examples if isinstance(q, (int, np.integer))} if box is None else {
            int(q) for q in examples[1:] if isinstance(q, (int, np.integer))}
        if expand:
            top, _ = self._ranked(weights, queries, int(expand), exclude, accept)
            ids = np.array([r["id"] for r in top], np.int64)
            scores = np.array([r["score"] for r in top], np.float32)
            queries = {n: fb.expand(queries[n], self.store(n).reconstruct(ids), scores) for n in names}
        results, more = self._ranked(weights, queries, int(offset) + int(k), exclude, accept)
        out = {"query": self._describe(examples[0], box), "layer": names[0] if len(names) == 1 else COMBINED,
               "offset": int(offset), "more": more, "results": results[int(offset):]}
        if len(names) > 1:
            out["weights"] = {n: round(w, 6) for n, w in weights.items()}
        if len(examples) > 1 or like or unlike:
            out["query"].update(examples=[self._describe(q) for q in examples], like=[self._describe(q) for q in like],
                                unlike=[self._describe(q) for q in unlike],
                                rule={"name": "rocchio", "alpha": fb.ALPHA, "beta": fb.BETA, "gamma": fb.GAMMA})
        if expand:
            out["query"]["expand"] = {"n": int(expand), "power": fb.QE_POWER}
        return out

    def query_vectors(self, query, layers: list[str], box=None) -> dict[str, np.ndarray]:
        """The query's descriptor on each of these layers (an image is run through the network once)."""
        if len(layers) == 1 or (isinstance(query, (int, np.integer)) and box is None):
            return {n: self.query_vector(query, n, box) for n in layers}
        found = self.query_embedder.embed_images([self.query_image(query, box)])  # as the stores were made
        out = {}
        for n in layers:
            w = self.whitening(n)
            out[n] = (w.transform(found[n]) if w else found[n])[0]
        return out

    def _ranked(self, weights: dict, queries: dict, want: int, exclude: set, accept) -> tuple[list[dict], bool]:
        if len(weights) == 1:
            (name,) = weights
            return nearest(self.store(name), self.catalog, queries[name], want, exclude=exclude, accept=accept)
        stores = {n: self.store(n) for n in weights}
        return ranked(stores, weights, self.catalog, queries, want, exclude=exclude, accept=accept)

    def _describe(self, query, box=None) -> dict:
        if isinstance(query, (int, np.integer)):
            q = {"id": int(query), "path": self.item(int(query))["path"]}
        elif isinstance(query, (str, os.PathLike)):
            q = {"id": None, "path": os.path.abspath(os.fspath(query))}
        else:
            q = {"id": None, "path": None}
        if box is not None:
            q["box"] = list(box)
        return q
