; C++ units: function definitions (named by c.py from their declarator),
; classes, structs, unions and enums with a body; namespaces are scopes.
(function_definition) @function
(class_specifier name: (_) @name body: (_)) @class
(struct_specifier name: (_) @name body: (_)) @class
(union_specifier name: (_) @name body: (_)) @class
(enum_specifier name: (_) @name body: (_)) @class
(type_definition
  type: [(struct_specifier !name body: (_)) (class_specifier !name body: (_))
         (union_specifier !name body: (_)) (enum_specifier !name body: (_))]
  declarator: (type_identifier) @name) @class
(namespace_definition name: (_) @name) @scope
