-- Column names and types of a (temp) table.
describe {{ table|ident }}
