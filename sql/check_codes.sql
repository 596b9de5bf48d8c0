-- code-outside-codebook: single/scale values that are not valid codes (integer-coded columns
-- compare in integer form, '3.0' = '3'; their non-numbers are left to check_not_numeric).
with long as (
    from (
        select {{ id|ident }} as "__wavebook_id"{% for c in columns %}, {{ c|ident }}{% endfor %}
        from {{ raw|ident }}
    ) unpivot (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
),
coded as (
    select
        l."__wavebook_id" as id,
        l.col,
        case when k.int_coded then wb_code(l.val) else l.val end as code
    from long as l
    join wb_columns as k on k.col = l.col
    where not (k.int_coded and wb_number(l.val) is null)
)
select c.col, c.code as value, count(*) as n, min(c.id, 5) as examples, null as detail
from coded as c
anti join wb_allowed as a on a.col = c.col and a.code = c.code
group by c.col, c.code
order by c.col, c.code
