"""What a person looks at: the live terminal dashboard and the pictures of one item.

board.py      one dashboard frame read from the store: header facts and a row per item
dashboard.py  render a frame with rich, the refresh loop and its keys
rowtext.py    a row's look (by the time left), its order, symbol and words
keys.py       single key presses from a terminal, for the dashboard
curves.py     the fitted curve and its 90 % band, rebuilt from a forecast
plotting.py   an item's readings, fitted curve and forecast band as a PNG (Agg, no pyplot)
"""
