-- wb_bad: (key, col, val) for every raw spelling of each bad value found on wb_values.
create or replace temp table wb_bad as
select * from {{ frame|ident }}
