"""What a person looks at: the live terminal dashboard and the pictures of one item.

dashboard.py  collect a frame from the store, render it with rich
keys.py       single key presses from a terminal, for the dashboard
plotting.py   an item's readings, fitted curve and forecast band as a PNG (Agg, no pyplot)
"""
