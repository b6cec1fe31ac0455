; TypeScript / TSX units (same query for both grammars).
(function_declaration name: (identifier) @name) @function
(generator_function_declaration name: (identifier) @name) @function
(method_definition name: (_) @name) @function
(class_declaration name: (_) @name) @class
(abstract_class_declaration name: (_) @name) @class
(interface_declaration name: (_) @name) @class
(enum_declaration name: (_) @name) @class
(variable_declarator
  name: (identifier) @name
  value: [(arrow_function) (function_expression)]) @function
(assignment_expression
  left: (member_expression property: (property_identifier) @name)
  right: [(arrow_function) (function_expression)]) @function
