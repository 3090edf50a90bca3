"""Side-by-side benchmarks: jobdesk against what a user would otherwise do, as ratios.

Each case module (``case1_cache_hit`` ... ``case6_keys``) measures jobdesk and its baseline in
the same run, on the same data served by the embedded service, because the machines these run
on are shared and noisy: absolute times drift, ratios much less.  ``python -m benchmarks``
runs them all (see ``__main__``); ``docs/performance.md`` shows the latest full run.
"""
