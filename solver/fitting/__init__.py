"""The fitting layer: least-squares fits with error bars, measured data files, scenario fits and
the sensitivity tables written next to a sweep."""
