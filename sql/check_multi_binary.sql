-- multi-not-binary: items of a multiple-response set hold 1 (selected), 0 (not) or nothing (not asked).
with long as (
    from (
        select {{ id|ident }} as "__wavebook_id"{% for c in columns %}, {{ c|ident }}{% endfor %}
        from {{ raw|ident }}
    ) unpivot (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
)
select col, val as value, count(*) as n, min("__wavebook_id", 5) as examples, null as detail
from long
where wb_code(val) not in ('0', '1')
group by col, val
order by col, val
