-- The weighting tables of the study database (`weights` and the `weighting_*` diagnostics) that
-- exist; restaging a wave deletes its rows from each in the staging transaction.
select table_name
from information_schema.tables
where table_schema = 'main' and (table_name = 'weights' or table_name like 'weighting\_%' escape '\')
order by table_name
