"""The report's sections, in page order: one module each, with its template in
``reports/sections/<name>.html.j2``.

A section module has ``KEY`` (the name its content has in the template) and
``TITLE`` (its entry in the table of contents) and ``build(inputs: SectionInputs)``.
A new section is a module here, its template, and its place in ``SECTIONS``.
"""

from estbench.report.sections import (appendix, convergence, efficiency, glance, intervals, performance,
                                      precision)

#: The sections in page order.
SECTIONS = (glance, precision, performance, convergence, intervals, efficiency, appendix)
