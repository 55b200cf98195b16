"""Pictures: the self-contained HTML page of a check (docs/pictures.md). scene.py takes what
to draw from each checked top, maps.py the maps, svg.py turns geometry into SVG text,
page.py assembles the page; palette.py holds our colours."""
