-- weight-out-of-range: design weights (a base weight, or 1 / a selection probability) that are
-- not finite or exceed $largest, so no sum of squares or effective n can be computed. Values
-- the bad-design-weight rule reports (<= 0, a probability > 1) are left to that rule.
with weights as (
    select
        wb_text({{ id|ident }}) as id,
        {% if probability %}1 / {% endif %}wb_number({{ column|ident }}) as weight
    from {{ raw|ident }}
    where wb_number({{ column|ident }}) > 0{% if probability %} and wb_number({{ column|ident }}) <= 1{% endif %}
)
select
    $column as col,
    null as value,
    count(*) as n,
    min(id, 5) as examples,
    'largest ' || cast(max(weight) as varchar) as detail
from weights
where not isfinite(weight) or weight > $largest
having count(*) > 0
