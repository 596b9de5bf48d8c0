-- Append the rows of a registered frame to a weighting table, matching columns by name.
insert into {{ table|ident }} by name select * from {{ frame|ident }}
