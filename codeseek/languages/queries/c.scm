; C units: function definitions (named by c.py from their declarator) and
; structs, unions and enums with a body.
(function_definition) @function
(struct_specifier name: (type_identifier) @name body: (_)) @class
(union_specifier name: (type_identifier) @name body: (_)) @class
(enum_specifier name: (type_identifier) @name body: (_)) @class
(type_definition
  type: [(struct_specifier !name body: (_)) (union_specifier !name body: (_))
         (enum_specifier !name body: (_))]
  declarator: (type_identifier) @name) @class
