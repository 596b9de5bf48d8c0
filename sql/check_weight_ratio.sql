-- extreme-weight (warning): design weights (a base weight, or 1 / a selection probability) above
-- $ratio times the median design weight of the wave. Weights other rules reject are left out.
with weights as (
    select
        wb_text({{ id|ident }}) as id,
        {% if probability %}1 / {% endif %}wb_number({{ column|ident }}) as weight
    from {{ raw|ident }}
    where wb_number({{ column|ident }}) > 0{% if probability %} and wb_number({{ column|ident }}) <= 1{% endif %}
),
finite as (
    select * from weights where isfinite(weight) and weight <= $largest
),
middle as (
    select median(weight) as median from finite
)
select
    $column as col,
    null as value,
    count(*) as n,
    min(id, 5) as examples,
    'median ' || cast(any_value(middle.median) as varchar) || ', largest ' || cast(max(weight) as varchar) as detail
from finite, middle
where weight > $ratio * middle.median
having count(*) > 0
