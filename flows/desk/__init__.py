"""The reviewer's desk: the morning review in a browser, with electronic signatures (an edge, like the CLI).

``app`` builds the Starlette application; its handlers read through ``pipeline.records`` queries
(``desk_queries``, ``desk_accounts``, ``chart_queries``) and sign only through ``acts``, which calls
the same use cases as the command line. ``static_page`` writes a night's review page as a file.
"""
