"""`demur bench`: side-by-side measurements of what `demur export` and `demur serve` give by default.

engine  the graph kinds, memory, summaries, ratios, targets and the printed table (run_bench)
conv    the conv nets it measures (a user's own architecture through export_model)
http    HTTP on 127.0.0.1: loop-front sizings, the ASGI candidate, the torch server
asgi    the maintained-server candidate (uvicorn under gunicorn) measured against the loop front
"""
