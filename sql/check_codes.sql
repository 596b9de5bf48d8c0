-- code-outside-codebook: single/scale values that are not valid codes. Integer-coded columns
-- compare in integer form ('3.0' = '3'; their non-numbers are check_codes_not_numeric's);
-- string codes compare trimmed. spellings: the raw values behind each code, to find examples.
with coded as (
    select
        v.col,
        case when k.int_coded then wb_code(v.val) else wb_text(v.val) end as code,
        v.val,
        v.n
    from wb_values as v
    join wb_columns as k on k.col = v.col
    where not k.is_item and not (k.int_coded and wb_number(v.val) is null) and wb_text(v.val) is not null
)
select c.col, c.code as value, cast(sum(c.n) as bigint) as n, [] as examples, null as detail, list(c.val) as spellings
from coded as c
anti join wb_allowed as a on a.col = c.col and a.code = c.code
group by c.col, c.code
order by c.col, c.code
