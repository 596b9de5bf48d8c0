-- wb_columns: the role of each spec column present in the file, for the checks.
create or replace temp table wb_columns as
select * from {{ frame|ident }}
