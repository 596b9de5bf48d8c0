-- One pass over the wave counting, for every row rule and column at once, the rows the rule's own
-- query would report (pipeline.staging.checks runs a rule's query, with its values, counts and
-- example ids, only where this count is not 0). Columns come out in template order:
-- missing-id, duplicate-id (ids minus distinct id hashes: 0 proves the ids unique; a hash
-- collision only costs the exact query), then per design column missing-design-value, per
-- numeric/weight column not-a-number, per bounded column out-of-bounds, per weight column
-- bad-design-weight and weight-out-of-range.
-- Identifiers: raw, id, design, numbers, bounded, weights ({name, probability}).
-- Values: $minimum, $maximum (bounds in `bounded` order; -inf / +inf when absent), $largest.
select
    count(*) filter (where wb_blank({{ id|ident }})),
    count(wb_text({{ id|ident }})) - count(distinct hash(wb_text({{ id|ident }})))
    {%- for c in design %},
    count(*) filter (where wb_blank({{ c|ident }}))
    {%- endfor %}
    {%- for c in numbers %},
    count(*) filter (where not coalesce(isfinite(try_cast({{ c|ident }} as double)), false) and not wb_blank({{ c|ident }}))
    {%- endfor %}
    {%- for c in bounded %},
    count(*) filter (where wb_number({{ c|ident }}) < $minimum[{{ loop.index }}] or wb_number({{ c|ident }}) > $maximum[{{ loop.index }}])
    {%- endfor %}
    {%- for c in weights %},
    count(*) filter (where wb_number({{ c.name|ident }}) <= 0{% if c.probability %} or wb_number({{ c.name|ident }}) > 1{% endif %}),
    count(*) filter (
        where wb_number({{ c.name|ident }}) > 0{% if c.probability %} and wb_number({{ c.name|ident }}) <= 1{% endif %}
            and (not isfinite({% if c.probability %}1 / {% endif %}wb_number({{ c.name|ident }}))
                 or {% if c.probability %}1 / {% endif %}wb_number({{ c.name|ident }}) > $largest)
    )
    {%- endfor %}
from {{ raw|ident }}
