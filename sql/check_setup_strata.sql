-- wb_strata: the strata with a population size or sampling fraction (code as text, size may be NULL).
create or replace temp table wb_strata as
select * from {{ frame|ident }}
