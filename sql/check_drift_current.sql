-- The distribution of this wave's codes (single/scale codes and multi items), for the drift checks.
create or replace temp table wb_current as
with long as (
    from (
        select {% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}
        from {{ raw|ident }}
    ) unpivot (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
)
select l.col, case when k.int_coded then wb_code(l.val) else l.val end as code, count(*) as n
from long as l
join wb_columns as k on k.col = l.col
group by all
