-- Column names and types of a registered data frame.
describe select * from {{ frame|ident }}
